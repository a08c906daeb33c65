"""Weighted kernel densities over the encoded rows of a search space.

A :class:`MixedKDE` is a weighted mixture of product kernels, one kernel per
coordinate of a :class:`~warmstart.space.Space` encoding:

``real``
    a Gaussian truncated to ``[0, 1]`` and renormalised, so the density
    respects the bounds of the unit cube and integrates to one over it;
``integer``
    the same truncated Gaussian on the cell-centre coordinate, with a
    bandwidth of at least one cell;
``choice``
    the Aitchison–Aitken kernel on the level index: probability ``1 - lam``
    of keeping the centre's level, ``lam / (k - 1)`` for each other level.

Inactive (NaN) coordinates follow one rule, which keeps the mixture a proper
density over configs of a conditional space: where the *query* is inactive
the coordinate contributes a factor 1 (it does not exist there); where the
query is active but the *centre* is inactive, the factor is the uniform
density of that coordinate (1 on ``[0, 1]``, ``1/k`` for a choice). Sampling
follows the same rule, so samples come from exactly the density evaluated.

Bandwidths follow :class:`scipy.stats.gaussian_kde`: weights are normalised,
the effective sample size is ``1 / sum(w**2)`` and Scott's or Silverman's
factor of it scales the weighted standard deviation of each coordinate. The
bandwidths therefore shrink as centres accumulate.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from scipy.special import ndtr, ndtri

from warmstart._checks import check_number
from warmstart.errors import WarmstartError
from warmstart.space import Space

__all__ = ["MixedKDE", "KDEStack", "KDEError", "log_sum_exp", "uniform_logpdf"]

_LOG_2PI = math.log(2.0 * math.pi)
#: Smallest bandwidth of a ``real`` coordinate (unit-cube width 1).
MIN_REAL_BANDWIDTH = 1e-3
#: Largest bandwidth of a ``real``/``integer`` coordinate (the cube's width).
MAX_BANDWIDTH = 1.0
_UNIFORM_STD = 1.0 / math.sqrt(12.0)  # standard deviation of U(0, 1)
_CHUNK = 4096  # query rows evaluated at a time (bounds memory)


class _Kinds:
    """What a density needs of its space's coordinates, built once per space and
    kept in the space object's own attributes (the parameters of a space never
    change; a density of it is built at every proposal)."""

    __slots__ = ("choice", "cont", "levels", "cont_idx", "choice_idx", "lam_max", "uniform_spread")

    def __init__(self, space: Space):
        self.choice = space.is_choice
        self.cont = ~self.choice
        self.levels = space.n_levels
        self.cont_idx = np.flatnonzero(self.cont)
        self.choice_idx = np.flatnonzero(self.choice)
        lev = self.levels.astype(float)
        self.lam_max = np.where(self.choice, (lev - 1) / np.maximum(lev, 1), 0.0)  # largest choice bandwidth
        self.uniform_spread = np.where(self.choice, (lev - 1) / np.maximum(lev, 1), _UNIFORM_STD)
        for a in (self.cont, self.cont_idx, self.choice_idx, self.lam_max, self.uniform_spread):
            a.flags.writeable = False

    @staticmethod
    def of(space: Space) -> "_Kinds":
        kinds = space.__dict__.get("_kde_kinds")
        if kinds is None:
            kinds = space.__dict__["_kde_kinds"] = _Kinds(space)
        return kinds


class KDEError(WarmstartError, ValueError):
    """Kernel density inputs are not valid (shapes, weights, bandwidths)."""


def log_sum_exp(A: np.ndarray, b: np.ndarray | None = None) -> np.ndarray:
    """``log(sum_j b_j exp(A[:, j]))`` row by row, stable; rows of -inf give -inf.

    Same result as :func:`scipy.special.logsumexp` with ``axis=1``, without
    its overhead on small arrays.
    """
    m = A.max(axis=1)
    safe = np.where(np.isfinite(m), m, 0.0)
    E = np.exp(A - safe[:, None])
    s = E.sum(axis=1) if b is None else E @ b
    with np.errstate(divide="ignore"):
        return np.log(s) + safe


def uniform_logpdf(space: Space, X: np.ndarray) -> np.ndarray:
    """Log density of the uniform distribution over a space, at encoded rows.

    Every active ``real``/``integer`` coordinate contributes ``log 1 = 0``,
    every active ``choice`` coordinate ``-log k``; inactive ones nothing.

    Parameters
    ----------
    space : Space
        The space the rows are encoded in.
    X : array of shape (n, d)
        Encoded rows (NaN for inactive coordinates).

    Returns
    -------
    ndarray of shape (n,)
    """
    X = np.atleast_2d(np.asarray(X, dtype=float))
    choice = space.is_choice
    if not choice.any():
        return np.zeros(X.shape[0])
    logk = np.log(space.n_levels[choice].astype(float))
    return -((~np.isnan(X[:, choice])).astype(float) @ logk)


class MixedKDE:
    """Weighted product-kernel density over encoded rows of a space.

    Parameters
    ----------
    space : Space
        The space whose encoding the rows use (kinds and level counts).
    centres : array of shape (n, d)
        Kernel centres, encoded rows of ``space`` (NaN where inactive).
    weights : array of shape (n,), optional
        Non-negative weights, normalised to sum to one. Default: equal.
    bandwidth : {"scott", "silverman"}, float or array of shape (d,), default "scott"
        ``"scott"``/``"silverman"``: the factor of :class:`scipy.stats.gaussian_kde`
        on the effective sample size ``1 / sum(w**2)``; a float: that factor
        itself. A factor multiplies the weighted standard deviation of each
        continuous coordinate and the weighted dispersion ``1 - sum(p**2)``
        of each choice coordinate. An array gives the bandwidths directly:
        standard deviations on the unit scale for ``real``/``integer``
        coordinates, ``lam`` in ``(0, (k-1)/k]`` for ``choice`` coordinates.
    min_bandwidth : float, default 1e-3
        Floor of ``real`` bandwidths. ``integer`` coordinates use at least
        one cell (``1 / n_levels``); ``choice`` coordinates at least
        ``(k-1) / (k (1 + n_eff))`` (our rule: a smoothing that fades as
        centres accumulate, never zero). Rule-based bandwidths are also
        capped at 1 (the cube's width). Explicit bandwidths are only checked.
    shrink : float, default 0
        Pseudo-observations of the uniform distribution pooled into each
        coordinate's spread before the rule applies: the variance used is
        ``(n_eff var + shrink / 12) / (n_eff + shrink)`` (and likewise the
        dispersion of a choice). 0 gives the plain rule of
        :class:`scipy.stats.gaussian_kde`; a search uses about 2 so that a
        tight cluster of a few centres does not collapse the bandwidths.
    shrink_to : array of shape (d,), optional
        Spread of those pseudo-observations per coordinate instead of the
        uniform's: a standard deviation for ``real``/``integer``
        coordinates, a dispersion ``1 - sum(p**2)`` for ``choice`` ones
        (capped at the uniform's). A warm search passes the prior's spread.

    Attributes
    ----------
    bandwidths : ndarray of shape (d,)
        Bandwidth per coordinate (``lam`` for choice coordinates).
    n_eff : float
        Effective sample size ``1 / sum(w**2)``.

    Examples
    --------
    >>> space = Space.from_dict({"params": {"x": {"type": "real", "low": 0, "high": 1}}})
    >>> kde = MixedKDE(space, [[0.5]], bandwidth=[0.1])
    >>> float(np.exp(kde.logpdf([[0.5]]))[0].round(4))
    3.9894
    """

    def __init__(
        self,
        space: Space,
        centres: Any,
        weights: Any = None,
        bandwidth: Any = "scott",
        min_bandwidth: float = MIN_REAL_BANDWIDTH,
        shrink: float = 0.0,
        shrink_to: Any = None,
    ):
        if not isinstance(space, Space):
            raise KDEError(f"space must be a warmstart Space, got {type(space).__name__}")
        self.space = space
        d = space.dim
        X = np.array(centres, dtype=float)
        if X.ndim == 1 and d == 1:
            X = X[:, None]
        if X.ndim != 2 or X.shape[1] != d:
            raise KDEError(
                f"centres must have shape (n, {d}) for a space of {d} parameter(s), got "
                f"shape {X.shape}; pass one encoded row per centre (transpose?)"
            )
        if X.shape[0] == 0:
            raise KDEError("centres is empty; a kernel density needs at least one centre")
        if np.isinf(X).any():
            raise KDEError("centres contain infinite values; encode configs with Space.encode")
        self._kind_masks()
        lev = self._levels
        choice_vals = X[:, self._choice_idx]
        ok = ~np.isnan(choice_vals)
        if self._choice_idx.size and ok.any():
            bad = ok & ((choice_vals < 0) | (choice_vals > lev[self._choice] - 1)
                        | (choice_vals != np.round(choice_vals)))
            if bad.any():
                j = int(self._choice_idx[np.nonzero(bad)[1][0]])
                raise KDEError(
                    f"centres: coordinate {j} ({space.names[j]!r}) is a choice and needs level "
                    f"indices 0..{lev[j] - 1}, got {choice_vals[bad][0]!r}"
                )
        cont = X[:, self._cont_idx]
        if (cont < 0).any() or (cont > 1).any():  # NaN (inactive) compares False
            raise KDEError("centres: real/integer coordinates must lie in [0, 1] (the unit cube)")
        n = X.shape[0]
        if weights is None:
            w = np.full(n, 1.0 / n)
        else:
            w = np.asarray(weights, dtype=float).ravel()
            if w.shape != (n,):
                raise KDEError(f"weights must have shape ({n},) like the centres, got {w.shape}")
            if not np.isfinite(w).all() or (w < 0).any() or w.sum() <= 0:
                raise KDEError("weights must be finite, non-negative and not all zero")
            w = w / w.sum()
        self.centres = X
        self.weights = w
        self.n_eff = float(1.0 / np.dot(w, w))
        self.min_bandwidth = check_number("min_bandwidth", min_bandwidth, low=0.0, low_open=True, error=KDEError,
                                          fix="it is the smallest kernel width, e.g. 1e-3")
        self.shrink = check_number("shrink", shrink, low=0.0, error=KDEError,
                                   fix="it counts pseudo-observations, e.g. 0 (none) or 2")
        self.shrink_to = self._reference_spread(shrink_to)
        self.bandwidths = self._bandwidths(bandwidth)
        self._prepare()

    # -- construction ----------------------------------------------------
    def _kind_masks(self) -> None:
        kinds = self._kinds = _Kinds.of(self.space)
        self._choice, self._cont, self._levels = kinds.choice, kinds.cont, kinds.levels
        self._cont_idx, self._choice_idx = kinds.cont_idx, kinds.choice_idx

    def _reference_spread(self, shrink_to: Any) -> np.ndarray:
        """Spread the pooled pseudo-observations have: the uniform's by default."""
        uniform = self._kinds.uniform_spread
        if shrink_to is None:
            return uniform
        ref = np.asarray(shrink_to, dtype=float)
        if ref.shape != uniform.shape or not np.isfinite(ref).all() or (ref < 0).any():
            raise KDEError(f"shrink_to must be {uniform.size} finite numbers >= 0 (one spread per "
                           f"coordinate), got {shrink_to!r}")
        return np.minimum(ref, uniform)

    def factor_for(self, rule: Any) -> float:
        """Bandwidth factor of a rule on this density's effective sample size.

        Scott: ``n_eff ** (-1 / (d + 4))``; Silverman:
        ``(n_eff (d + 2) / 4) ** (-1 / (d + 4))``, as in
        :class:`scipy.stats.gaussian_kde`.
        """
        d = self.space.dim
        if isinstance(rule, str):
            if rule == "scott":
                return self.n_eff ** (-1.0 / (d + 4))
            if rule == "silverman":
                return (self.n_eff * (d + 2) / 4.0) ** (-1.0 / (d + 4))
            raise KDEError(f"bandwidth rule {rule!r} is unknown; use 'scott', 'silverman', "
                           "a positive factor or an array of bandwidths")
        f = float(rule)
        if not math.isfinite(f) or f <= 0:
            raise KDEError(f"bandwidth factor must be a positive number, got {rule!r}")
        return f

    def _bandwidths(self, bandwidth: Any) -> np.ndarray:
        d = self.space.dim
        lev = self._levels
        lam_max = self._kinds.lam_max
        if not isinstance(bandwidth, str) and np.ndim(bandwidth) == 1:
            h = np.asarray(bandwidth, dtype=float)
            if h.shape != (d,):
                raise KDEError(f"bandwidth array must have shape ({d},), got {h.shape}")
            single = self._choice & (lev <= 1)
            bad = ~np.isfinite(h) | ((h <= 0) & ~single) | (self._choice & ~single & (h > lam_max))
            if bad.any():
                j = int(np.flatnonzero(bad)[0])
                allowed = f"(0, {lam_max[j]:.4g}]" if self._choice[j] else "> 0"
                raise KDEError(
                    f"bandwidth of coordinate {j} ({self.space.names[j]!r}) is {h[j]!r}; "
                    f"it must be {allowed}"
                )
            return np.where(single, 0.0, h)
        f = self.factor_for(bandwidth)
        X, w = self.centres, self.weights
        h = np.zeros(d)
        # continuous coordinates, all at once: weights renormalised over the
        # centres active in each coordinate
        cont = self._cont_idx
        if cont.size:
            C = X[:, cont]
            act = ~np.isnan(C)
            W = w[:, None] * act
            tot = W.sum(axis=0)
            W = W / np.where(tot > 0, tot, 1.0)
            sw2 = (W**2).sum(axis=0)
            Cz = np.where(act, C, 0.0)
            mean = (W * Cz).sum(axis=0)
            spread_ok = (act.sum(axis=0) >= 2) & (sw2 < 1.0)
            # unbiased weighted variance, as numpy.cov(aweights=...) in gaussian_kde
            var = (W * (Cz - mean) ** 2).sum(axis=0) / np.where(spread_ok, 1.0 - sw2, 1.0)
            neff = 1.0 / np.where(sw2 > 0, sw2, 1.0)
            var = (neff * var + self.shrink * self.shrink_to[cont] ** 2) / (neff + self.shrink)
            # one active centre: no spread to measure; assume the uniform's
            std = np.where(spread_ok, np.sqrt(np.maximum(var, 0.0)), _UNIFORM_STD)
            lev_c = self._levels[cont]
            floor = np.where(lev_c > 0, np.maximum(self.min_bandwidth, 1.0 / np.maximum(lev_c, 1)),
                             self.min_bandwidth)  # integer: at least one cell
            h[cont] = np.clip(f * std, floor, MAX_BANDWIDTH)
        for j in self._choice_idx:  # loop over choice coordinates, never points
            col = X[:, j]
            ok = ~np.isnan(col)
            k = int(lev[j])
            if k <= 1:
                continue
            if not ok.any():
                h[j] = lam_max[j]
                continue
            wj = w[ok] / w[ok].sum()
            neff = 1.0 / np.dot(wj, wj)
            p = np.bincount(col[ok].astype(int), weights=wj, minlength=k)
            spread = 1.0 - np.dot(p, p)
            spread = (neff * spread + self.shrink * self.shrink_to[j]) / (neff + self.shrink)
            floor = lam_max[j] / (1.0 + neff)
            h[j] = min(max(f * spread, floor), lam_max[j])
        return h

    def _prepare(self) -> None:
        """Precompute the matrices that turn evaluation into matrix products."""
        X, h = self.centres, self.bandwidths
        cont = self._cont_idx
        C = X[:, cont]
        ca = ~np.isnan(C)
        Cz = np.where(ca, C, 0.0)
        hc = h[cont]
        self._inv_h2 = 1.0 / hc**2
        lo = ndtr((0.0 - Cz) / hc)
        hi = ndtr((1.0 - Cz) / hc)
        self._cdf_lo = lo
        self._cdf_hi = hi
        log_norm = -np.log(hc) - 0.5 * _LOG_2PI - np.log(hi - lo)
        self._ca = ca.astype(float)
        self._c1 = np.where(ca, Cz, 0.0)
        self._c2 = np.where(ca, Cz**2, 0.0)
        self._c_norm = np.where(ca, log_norm, 0.0)
        # choice coordinates: one block of k columns per coordinate
        choice = self._choice_idx
        blocks = []
        offsets = [0]
        for j in choice:
            k = int(self._levels[j])
            col = X[:, j]
            lam = h[j]
            if k <= 1:
                block = np.zeros((X.shape[0], k))
            else:
                same = math.log1p(-lam)
                other = math.log(lam / (k - 1))
                block = np.full((X.shape[0], k), other)
                ok = ~np.isnan(col)
                block[np.flatnonzero(ok), col[ok].astype(int)] = same
                block[~ok] = -math.log(k)
            blocks.append(block)
            offsets.append(offsets[-1] + k)
        self._choice_table = np.hstack(blocks) if blocks else np.zeros((X.shape[0], 0))
        self._choice_offsets = offsets
        self._cdf: np.ndarray | None = None  # cumulative weights, built by the first draw
        self._log_w = np.log(np.maximum(self.weights, 1e-300))
        self._log_w[self.weights == 0] = -np.inf

    # -- evaluation ------------------------------------------------------
    def _check_rows(self, X: Any) -> np.ndarray:
        X = np.array(X, dtype=float)
        d = self.space.dim
        if X.ndim == 1 and d == 1:
            X = X[:, None]
        X = np.atleast_2d(X)
        if X.ndim != 2 or X.shape[1] != d:
            raise KDEError(f"rows must have shape (m, {d}), got {X.shape}")
        return X

    def log_kernel(self, X: Any) -> np.ndarray:
        """Log kernel value of every query row at every centre, shape (m, n)."""
        X = self._check_rows(X)
        Q = X[:, self._cont_idx]
        qa = ~np.isnan(Q)
        Qz = np.where(qa, Q, 0.0)
        qaf = qa.astype(float)
        ih = self._inv_h2
        # sum over coordinates active in both query and centre of (q - c)^2 / h^2
        sq = (qaf * Qz**2 * ih) @ self._ca.T - 2.0 * (Qz * ih) @ self._c1.T + qaf @ (self._c2 * ih).T
        out = -0.5 * np.maximum(sq, 0.0) + qaf @ self._c_norm.T
        # query active where the centre is inactive: uniform density 1 -> log 0
        if self._choice_idx.size:
            m = X.shape[0]
            onehot = np.zeros((m, self._choice_table.shape[1]))
            for b, j in enumerate(self._choice_idx):
                col = X[:, j]
                ok = ~np.isnan(col)
                onehot[np.flatnonzero(ok), self._choice_offsets[b] + col[ok].astype(int)] = 1.0
            out += onehot @ self._choice_table.T
        return out

    def logpdf(self, X: Any) -> np.ndarray:
        """Log density at encoded rows.

        Parameters
        ----------
        X : array of shape (m, d)
            Encoded rows of the space (NaN for inactive coordinates).

        Returns
        -------
        ndarray of shape (m,)
        """
        X = self._check_rows(X)
        out = np.empty(X.shape[0])
        for start in range(0, X.shape[0], _CHUNK):  # blocks of rows bound the memory
            block = X[start:start + _CHUNK]
            out[start:start + _CHUNK] = log_sum_exp(self.log_kernel(block) + self._log_w)
        return out

    def pdf(self, X: Any) -> np.ndarray:
        """Density at encoded rows (``exp(logpdf(X))``)."""
        return np.exp(self.logpdf(X))

    # -- sampling --------------------------------------------------------
    def sample(self, n: int, rng: Any = None) -> np.ndarray:
        """Draw ``n`` encoded rows from the density.

        A centre is picked by weight, then each coordinate gets kernel noise
        (inverse-CDF draws from the truncated Gaussian; the Aitchison–Aitken
        kernel for choices; uniform where the centre is inactive). Rows are
        snapped onto valid points (integers to their cell, inactive
        coordinates to NaN) with :meth:`Space.snap`.

        Parameters
        ----------
        n : int
            Number of rows.
        rng : int, numpy Generator or None
            Source of randomness (normalised with ``numpy.random.default_rng``).

        Returns
        -------
        ndarray of shape (n, d)
        """
        rng = np.random.default_rng(rng)
        n = int(n)
        if n < 0:
            raise KDEError(f"number of samples must be >= 0, got {n}")
        d = self.space.dim
        idx = self.pick(n, rng)
        out = np.empty((n, d))
        cont = self._cont_idx
        if cont.size:
            u = rng.random((n, cont.size))
            lo, hi = self._cdf_lo[idx], self._cdf_hi[idx]
            z = ndtri(np.clip(lo + u * (hi - lo), 1e-300, 1.0 - 1e-16))
            draw = self._c1[idx] + z * self.bandwidths[cont]
            active = self._ca[idx] > 0
            out[:, cont] = np.where(active, np.clip(draw, 0.0, 1.0), u)
        for j in self._choice_idx:
            k = int(self._levels[j])
            c = self.centres[idx, j]
            lam = self.bandwidths[j]
            flip = rng.random(n) < lam
            other = rng.integers(0, max(k - 1, 1), size=n)
            cz = np.nan_to_num(c, nan=0.0).astype(int)
            moved = np.where(other >= cz, other + 1, other)
            level = np.where(flip & (k > 1), moved, cz)
            uniform = rng.integers(0, k, size=n)
            out[:, j] = np.where(np.isnan(c), uniform, level)
        return self.space.snap(out)

    def pick(self, n: int, rng: np.random.Generator) -> np.ndarray:
        """Indices of ``n`` centres drawn by weight, with replacement.

        The same draws, from the same random numbers, as
        ``rng.choice(n_centres, size=n, p=weights)`` (numpy's inverse-CDF
        method), with the cumulative weights computed once per density
        instead of checked and summed on every call.
        """
        if self._cdf is None:
            cdf = self.weights.cumsum()
            cdf /= cdf[-1]
            self._cdf = cdf
        return self._cdf.searchsorted(rng.random(int(n)), side="right")

    def __repr__(self) -> str:
        return (f"MixedKDE(n_centres={self.centres.shape[0]}, dim={self.space.dim}, "
                f"n_eff={self.n_eff:.3g})")


class KDEStack:
    """Several :class:`MixedKDE` over one space, evaluated together.

    ``KDEStack(kdes).logpdf(X)[:, k]`` equals ``kdes[k].logpdf(X)``; the
    kernels of every density are computed in one set of matrix products
    (each centre keeps its own density's bandwidths), then summed density by
    density. A search that mixes many past tasks' densities evaluates them
    all at once this way.

    Parameters
    ----------
    kdes : sequence of MixedKDE
        Densities over the same space (at least one).
    """

    def __init__(self, kdes):
        kdes = list(kdes)
        if not kdes:
            raise KDEError("a stack needs at least one kernel density")
        space = kdes[0].space
        if any(k.space is not space and k.space != space for k in kdes):
            raise KDEError("every density of a stack must be over the same space")
        self.space = space
        self.n_densities = len(kdes)
        sizes = [k.centres.shape[0] for k in kdes]
        self._starts = np.concatenate([[0], np.cumsum(sizes)[:-1]]).astype(int)
        self._owner = np.repeat(np.arange(len(kdes)), sizes)
        self._cont_idx = kdes[0]._cont_idx
        self._choice_idx = kdes[0]._choice_idx
        self._choice_offsets = kdes[0]._choice_offsets
        ih = np.vstack([np.broadcast_to(k._inv_h2, (n, k._inv_h2.size)) for k, n in zip(kdes, sizes)])
        ca = np.vstack([k._ca for k in kdes])
        self._a = ca * ih
        self._b = np.vstack([k._c1 for k in kdes]) * ih
        self._c = np.vstack([k._c2 for k in kdes]) * ih
        self._norm = np.vstack([k._c_norm for k in kdes])
        self._choice_table = np.vstack([k._choice_table for k in kdes])
        self._log_w = np.concatenate([k._log_w for k in kdes])

    def logpdf(self, X) -> np.ndarray:
        """Log density of every stacked density at encoded rows, shape (m, n_densities)."""
        X = np.atleast_2d(np.asarray(X, dtype=float))
        if X.ndim != 2 or X.shape[1] != self.space.dim:
            raise KDEError(f"rows must have shape (m, {self.space.dim}), got {X.shape}")
        Q = X[:, self._cont_idx]
        qa = ~np.isnan(Q)
        Qz = np.where(qa, Q, 0.0)
        qaf = qa.astype(float)
        # as MixedKDE.log_kernel, with each centre's own bandwidths folded into the matrices
        sq = (qaf * Qz**2) @ self._a.T - 2.0 * Qz @ self._b.T + qaf @ self._c.T
        out = -0.5 * np.maximum(sq, 0.0) + qaf @ self._norm.T
        if self._choice_idx.size:
            onehot = np.zeros((X.shape[0], self._choice_table.shape[1]))
            for b, j in enumerate(self._choice_idx):
                col = X[:, j]
                ok = ~np.isnan(col)
                onehot[np.flatnonzero(ok), self._choice_offsets[b] + col[ok].astype(int)] = 1.0
            out += onehot @ self._choice_table.T
        out += self._log_w
        top = np.maximum.reduceat(out, self._starts, axis=1)
        safe = np.where(np.isfinite(top), top, 0.0)
        with np.errstate(divide="ignore"):
            return np.log(np.add.reduceat(np.exp(out - safe[:, self._owner]), self._starts, axis=1)) + safe

