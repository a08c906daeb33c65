"""Kernel densities of many subsets of the same rows, evaluated at once.

A cross-validated density (the mixture search's own model judged out of
sample, :meth:`~warmstart.search.mixture.MixtureSearch.current_weights`)
fits one :class:`~warmstart.search.kde.MixedKDE` per fold and set: 40
small densities after every result, each a few dozen numpy calls. Here the
subsets are rows of a membership matrix and every step is one array
operation over all of them: the bandwidth rule of :class:`MixedKDE` (equal
weights, Scott's factor of the effective sample size, ``shrink``
pseudo-observations of the uniform spread, the same floors and caps), then
the log density of each subset at its own query rows (the same kernels:
truncated Gaussians on ``real``/``integer`` coordinates, Aitchison-Aitken on
``choice`` ones, the same rule for inactive coordinates).

The numbers equal :meth:`MixedKDE.logpdf` of each subset up to rounding
(sums taken in another order; tests check 1e-9 relative against the
one-density-at-a-time reference).
"""

from __future__ import annotations

import math

import numpy as np
from scipy.special import ndtr

from warmstart.search.kde import MAX_BANDWIDTH, MIN_REAL_BANDWIDTH
from warmstart.space import Space

__all__ = ["subset_bandwidths", "subset_logpdf"]

_LOG_2PI = math.log(2.0 * math.pi)
_UNIFORM_STD = 1.0 / math.sqrt(12.0)


def subset_bandwidths(space: Space, X: np.ndarray, members: np.ndarray, shrink: float = 0.0) -> np.ndarray:
    """Bandwidths of :class:`MixedKDE` (rule ``"scott"``, equal weights) of each subset.

    Parameters
    ----------
    space : Space
    X : array of shape (n, d)
        Encoded rows (NaN where inactive).
    members : bool array of shape (s, n)
        Row ``k`` marks the centres of subset ``k`` (at least one each).
    shrink : float, default 0
        As in :class:`MixedKDE` (toward the uniform's spread).

    Returns
    -------
    ndarray of shape (s, d)
    """
    M = np.asarray(members, dtype=bool)
    S, n = M.shape
    d = space.dim
    choice = space.is_choice
    lev = space.n_levels
    size = M.sum(axis=1).astype(float)
    w = M / size[:, None]  # (S, n): equal weights over each subset
    n_eff = 1.0 / (w**2).sum(axis=1)
    f = n_eff ** (-1.0 / (d + 4))  # Scott's factor
    h = np.zeros((S, d))
    cont = np.flatnonzero(~choice)
    if cont.size:
        C = X[:, cont]
        act = ~np.isnan(C)
        W = w[:, :, None] * act[None]  # (S, n, dc)
        tot = W.sum(axis=1)
        W = W / np.where(tot > 0, tot, 1.0)[:, None, :]
        sw2 = (W**2).sum(axis=1)
        Cz = np.where(act, C, 0.0)
        mean = (W * Cz[None]).sum(axis=1)
        spread_ok = ((M[:, :, None] & act[None]).sum(axis=1) >= 2) & (sw2 < 1.0)
        var = (W * (Cz[None] - mean[:, None, :]) ** 2).sum(axis=1) / np.where(spread_ok, 1.0 - sw2, 1.0)
        neff = 1.0 / np.where(sw2 > 0, sw2, 1.0)
        var = (neff * var + shrink * _UNIFORM_STD**2) / (neff + shrink)
        std = np.where(spread_ok, np.sqrt(np.maximum(var, 0.0)), _UNIFORM_STD)
        lev_c = lev[cont]
        floor = np.where(lev_c > 0, np.maximum(MIN_REAL_BANDWIDTH, 1.0 / np.maximum(lev_c, 1)), MIN_REAL_BANDWIDTH)
        h[:, cont] = np.clip(f[:, None] * std, floor[None, :], MAX_BANDWIDTH)
    for j in np.flatnonzero(choice):  # loop over choice coordinates, never subsets or points
        k = int(lev[j])
        if k <= 1:
            continue
        lam_max = (k - 1) / k
        col = X[:, j]
        ok = ~np.isnan(col)
        wj = w * ok[None, :]
        tot = wj.sum(axis=1)
        none = tot <= 0
        wj = wj / np.where(none, 1.0, tot)[:, None]
        neff = 1.0 / np.where(none, 1.0, (wj**2).sum(axis=1))
        onehot = np.zeros((n, k))
        onehot[np.flatnonzero(ok), col[ok].astype(int)] = 1.0
        p = wj @ onehot  # (S, k)
        spread = 1.0 - (p**2).sum(axis=1)
        spread = (neff * spread + shrink * lam_max) / (neff + shrink)
        floor = lam_max / (1.0 + neff)
        h[:, j] = np.where(none, lam_max, np.minimum(np.maximum(f * spread, floor), lam_max))
    return h


def subset_logpdf(space: Space, X: np.ndarray, members: np.ndarray, queries: np.ndarray,
                  of: np.ndarray, shrink: float = 0.0) -> np.ndarray:
    """Log density of subset ``of[i]`` (its :class:`MixedKDE`) at row ``queries[i]`` of ``X``.

    Parameters
    ----------
    space : Space
    X : array of shape (n, d)
        Encoded rows: the centres of every subset, and the query rows.
    members : bool array of shape (s, n)
        Centres of each subset (equal weights).
    queries : int array of shape (p,)
        Rows of ``X`` to evaluate at.
    of : int array of shape (p,)
        The subset each query is evaluated under.
    shrink : float, default 0

    Returns
    -------
    ndarray of shape (p,)
    """
    M = np.asarray(members, dtype=bool)
    H = subset_bandwidths(space, X, M, shrink)[of]  # (p, d)
    Q = X[queries]  # (p, d)
    choice = space.is_choice
    lev = space.n_levels
    p, n = Q.shape[0], X.shape[0]
    log_k = np.zeros((p, n))
    cont = np.flatnonzero(~choice)
    if cont.size:
        C, q, h = X[:, cont], Q[:, cont], H[:, cont]
        ca, qa = ~np.isnan(C), ~np.isnan(q)
        Cz, qz = np.where(ca, C, 0.0), np.where(qa, q, 0.0)
        hh = h[:, None, :]
        mass = ndtr((1.0 - Cz[None]) / hh) - ndtr((0.0 - Cz[None]) / hh)  # (p, n, dc)
        z = (qz[:, None, :] - Cz[None]) / hh
        term = -0.5 * z**2 - np.log(hh) - 0.5 * _LOG_2PI - np.log(mass)
        log_k += np.where(qa[:, None, :] & ca[None], term, 0.0).sum(axis=2)
    for j in np.flatnonzero(choice):
        k = int(lev[j])
        if k <= 1:
            continue
        col, qv, lam = X[:, j], Q[:, j], H[:, j]
        same = np.log1p(-lam)[:, None]
        other = np.log(lam / (k - 1))[:, None]
        value = np.where(qv[:, None] == col[None, :], same, other)
        value = np.where(np.isnan(col)[None, :], -math.log(k), value)
        log_k += np.where(np.isnan(qv)[:, None], 0.0, value)
    size = M.sum(axis=1).astype(float)
    log_k = np.where(M[of], log_k - np.log(size[of])[:, None], -np.inf)
    top = log_k.max(axis=1)
    return np.log(np.exp(log_k - top[:, None]).sum(axis=1)) + top
