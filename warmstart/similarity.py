"""Similarity between tasks: distances between profiles, a kernel on them,
and re-weighting of neighbors by how well their rankings agree with a new
study's first scores.

Distances are computed after robust standardisation over the archive's
profiles: each meta-feature minus its median, divided by its interquartile
range / 1.349 (the IQR of a normal distribution in units of its standard
deviation). Count-like meta-features are already on a log scale in the profile;
moments with heavy tails (skewness, kurtosis) are put through ``asinh`` first
so that one extreme value cannot dominate. The distance is a weighted root
mean square of the standardised differences, so it does not grow with the
number of meta-features.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass
from typing import Any, Mapping, Sequence

import numpy as np
import pandas as pd

from warmstart.errors import ProfileError
from warmstart.profile import FEATURE_GROUPS

__all__ = [
    "HEAVY_TAILED",
    "Standardizer",
    "ProfileIndex",
    "Agreement",
    "feature_weights",
    "profile_distances",
    "median_bandwidth",
    "similarity_kernel",
    "rank_agreement",
]

#: meta-features put through asinh before standardising (unbounded moments)
HEAVY_TAILED = frozenset(
    {"skew_abs_mean", "skew_abs_max", "kurtosis_abs_mean", "kurtosis_abs_max", "target_skew", "target_kurtosis"}
)
_IQR_TO_SD = 1.349  # interquartile range of a standard normal distribution


def _transform(values: np.ndarray, features: Sequence[str]) -> np.ndarray:
    out = np.array(values, dtype=float, copy=True)
    heavy = [j for j, name in enumerate(features) if name in HEAVY_TAILED]
    if heavy:
        out[..., heavy] = np.arcsinh(out[..., heavy])
    return out


@dataclass(frozen=True)
class Standardizer:
    """Robust standardisation of profiles: (asinh for heavy tails, then)
    ``(value - median) / (IQR / 1.349)``.

    When the interquartile range of a meta-feature is zero the standard
    deviation is used, and when that is zero too, 1.

    Attributes
    ----------
    features : tuple of str
        Meta-feature names, in column order.
    center, scale : numpy.ndarray
        Median and scale per meta-feature (after the transform).
    """

    features: tuple
    center: np.ndarray
    scale: np.ndarray

    @classmethod
    def fit(cls, profiles: pd.DataFrame) -> "Standardizer":
        """Fit on a table of profiles (one row per task, one column per meta-feature)."""
        features = tuple(str(c) for c in profiles.columns)
        X = _transform(profiles.to_numpy(dtype=float), features)
        if X.shape[0] == 0:
            return cls(features, np.zeros(len(features)), np.ones(len(features)))
        with np.errstate(all="ignore"), warnings.catch_warnings():
            # all-missing columns (a meta-feature no task here has) warn; they get 0 and 1 below
            warnings.simplefilter("ignore", RuntimeWarning)
            q1, center, q3 = np.nanquantile(X, [0.25, 0.5, 0.75], axis=0) if np.isfinite(X).any() else (
                np.zeros((3, len(features))))
            scale = (q3 - q1) / _IQR_TO_SD
            sd = np.nanstd(X, axis=0) if X.shape[0] > 1 else np.zeros(len(features))
        scale = np.where(scale > 1e-12, scale, np.where(sd > 1e-12, sd, 1.0))
        return cls(features, np.nan_to_num(center), np.nan_to_num(scale, nan=1.0))

    def transform(self, profiles: pd.DataFrame | Mapping[str, float]) -> np.ndarray:
        """Standardised (n, d) array (one row for a single mapping); meta-features
        a profile lacks are NaN."""
        if isinstance(profiles, pd.DataFrame):
            X = profiles.reindex(columns=list(self.features)).to_numpy(dtype=float)
        else:
            X = np.array([[float(profiles.get(f, np.nan)) for f in self.features]])
        return (_transform(X, self.features) - self.center) / self.scale


def feature_weights(features: Sequence[str], weights: Mapping[str, float] | None = None) -> np.ndarray:
    """Weights per meta-feature from a mapping of meta-feature or group names.

    Parameters
    ----------
    features : sequence of str
        Meta-feature names, in column order.
    weights : mapping, optional
        ``{name: weight}`` where a name is a meta-feature or a group
        ("simple", "target", "statistical", "information", "landmarking");
        a meta-feature entry overrides its group's. Unlisted ones weigh 1.

    Returns
    -------
    numpy.ndarray
        Non-negative weights, one per feature.

    Raises
    ------
    ProfileError
        An unknown name, or a weight that is negative or not finite.
    """
    w = np.ones(len(features))
    if not weights:
        return w
    groups = {FEATURE_GROUPS.get(f) for f in features} - {None}
    known = set(features) | groups
    for key, value in weights.items():
        if key not in known:
            raise ProfileError(
                f"unknown meta-feature or group {key!r} in weights; valid names: groups {sorted(groups)} "
                f"or meta-features {sorted(features)}"
            )
        if not np.isfinite(value) or value < 0:
            raise ProfileError(f"weight of {key!r} must be a finite number >= 0, got {value!r}")
    for j, f in enumerate(features):
        group = FEATURE_GROUPS.get(f)
        if group in weights:
            w[j] = float(weights[group])
        if f in weights:
            w[j] = float(weights[f])
    if w.sum() <= 0:
        raise ProfileError("feature weights are all zero; give at least one positive weight")
    return w


def profile_distances(query: np.ndarray, Z: np.ndarray, w: np.ndarray | None = None) -> np.ndarray:
    """Weighted root-mean-square distance between one standardised profile
    and each row of Z.

    Parameters
    ----------
    query : (d,) array
    Z : (n, d) array
        NaN marks a meta-feature a profile lacks; that coordinate is left out
        and the others' weights are renormalised.
    w : (d,) array, optional
        Non-negative weights (all 1 by default).

    Returns
    -------
    (n,) array
        Distances; ``inf`` for a row that shares no meta-feature with the query.
    """
    Z = np.atleast_2d(Z)
    query = np.asarray(query, dtype=float).ravel()
    w = np.ones(Z.shape[1]) if w is None else np.asarray(w, dtype=float)
    diff = Z - query
    if not np.isnan(query).any() and not np.isnan(diff).any():
        total = w.sum()
        sq = np.einsum("ij,ij,j->i", diff, diff, w)
        return np.sqrt(sq / total) if total > 0 else np.full(len(Z), np.inf)
    present = ~np.isnan(diff)
    diff = np.where(present, diff, 0.0)
    total = present @ w
    sq = (diff * diff) @ w
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(total > 0, np.sqrt(sq / np.where(total > 0, total, 1.0)), np.inf)


def median_bandwidth(distances: np.ndarray) -> float:
    """Kernel bandwidth by the median heuristic (common practice): the median
    of the finite positive distances, or 1 when there are none."""
    d = np.asarray(distances, dtype=float)
    d = d[np.isfinite(d) & (d > 0)]
    return float(np.median(d)) if d.size else 1.0


def similarity_kernel(distances: np.ndarray, bandwidth: float | None = None) -> np.ndarray:
    """Gaussian kernel ``exp(-d^2 / (2 h^2))`` on distances (1 at distance 0).

    Parameters
    ----------
    distances : array
    bandwidth : float, optional
        ``h``; the median heuristic (:func:`median_bandwidth`) when omitted.
    """
    d = np.asarray(distances, dtype=float)
    h = median_bandwidth(d) if bandwidth is None else float(bandwidth)
    if not np.isfinite(h) or h <= 0:
        raise ProfileError(f"bandwidth must be a positive number, got {bandwidth!r}")
    return np.exp(-0.5 * (d / h) ** 2)


class ProfileIndex:
    """Archived profiles, standardised once, for fast nearest-task queries.

    Parameters
    ----------
    profiles : pandas.DataFrame
        One row per task (index: task id), one column per meta-feature; other
        non-numeric columns (e.g. ``profile_version``) are ignored.
    weights : mapping, optional
        Feature weights, see :func:`feature_weights`.

    Examples
    --------
    >>> frame = pd.DataFrame({"a": [0.0, 1.0, 5.0], "b": [1.0, 1.0, 2.0]}, index=[1, 2, 3])
    >>> ProfileIndex(frame).query({"a": 0.9, "b": 1.0}, k=1)["task_id"].tolist()
    [2]
    """

    def __init__(self, profiles: pd.DataFrame, weights: Mapping[str, float] | None = None):
        numeric = profiles.select_dtypes("number")
        self.task_ids = numeric.index.to_numpy()
        self.standardizer = Standardizer.fit(numeric)
        self.features = self.standardizer.features
        self.Z = self.standardizer.transform(numeric)
        self.weights = feature_weights(self.features, weights)
        self._order = np.argsort(self.task_ids, kind="stable")
        self._sorted_ids = self.task_ids[self._order]

    def positions(self, task_ids: Any) -> np.ndarray:
        """Row positions of the given task ids (-1 for ids not in the index)."""
        ids = np.asarray(task_ids).ravel()
        if not len(self._sorted_ids) or not ids.size:
            return np.full(ids.size, -1, dtype=np.int64)
        at = np.minimum(np.searchsorted(self._sorted_ids, ids), len(self._sorted_ids) - 1)
        found = self._sorted_ids[at] == ids
        return np.where(found, self._order[at], -1)

    def contains(self, task_ids: Any) -> np.ndarray:
        """Boolean mask: which of the given task ids are indexed."""
        return self.positions(task_ids) >= 0

    @classmethod
    def from_arrays(cls, task_ids: np.ndarray, features: Sequence[str], X: np.ndarray) -> "ProfileIndex":
        """Build from an (n, d) array of raw meta-feature values (NaN = absent)."""
        return cls(pd.DataFrame(X, index=np.asarray(task_ids), columns=list(features)))

    def __len__(self) -> int:
        return len(self.task_ids)

    def distances(self, prof: Mapping[str, float], weights: Mapping[str, float] | None = None) -> np.ndarray:
        """Distances from ``prof`` to every indexed task, in index order
        (``weights`` replace the index's feature weights for this query)."""
        shared = [f for f in self.features if f in prof]
        if not shared:
            raise ProfileError(
                f"the profile shares no meta-feature with the archive's ({sorted(self.features)[:6]} ...); "
                "was it computed by warmstart.profile?"
            )
        q = self.standardizer.transform(prof)[0]
        w = self.weights if weights is None else feature_weights(self.features, weights)
        return profile_distances(q, self.Z, w)

    def query(
        self,
        prof: Mapping[str, float],
        k: int | None = None,
        candidates: Any = None,
        bandwidth: float | None = None,
        weights: Mapping[str, float] | None = None,
    ) -> pd.DataFrame:
        """Nearest tasks first: ``task_id``, ``distance``, ``similarity``.

        Parameters
        ----------
        prof : mapping
            The new task's profile.
        k : int, optional
            Keep the k nearest (all when omitted).
        candidates : array-like of task ids, optional
            Restrict the search to these tasks.
        bandwidth : float, optional
            Kernel bandwidth; the median heuristic over the candidates' distances
            when omitted.
        weights : mapping, optional
            Feature weights for this query (see :func:`feature_weights`).
        """
        d = self.distances(prof, weights)
        ids = self.task_ids
        if candidates is not None:
            pos = self.positions(candidates if isinstance(candidates, np.ndarray) else np.asarray(list(candidates)))
            mask = np.zeros(len(ids), dtype=bool)
            mask[pos[pos >= 0]] = True  # each task once, in index order
            d, ids = d[mask], ids[mask]
        sim = similarity_kernel(d, bandwidth) if d.size else d
        if k is not None and k < d.size:
            top = np.argpartition(d, k - 1)[:k]
        else:
            top = np.arange(d.size)
        top = top[np.lexsort((ids[top], d[top]))]
        return pd.DataFrame({"task_id": ids[top], "distance": d[top], "similarity": sim[top]})


# -- rank agreement ------------------------------------------------------------
@dataclass(frozen=True)
class Agreement:
    """Rank agreement of candidate neighbors with a new study's scores.

    Attributes
    ----------
    tau : (k,) array
        Kendall's tau-b between the new scores and each neighbor's score at
        the nearest of its configs (oriented so that > 0 means agreement;
        0 when fewer than three pairs or no variation).
    n_matched : (k,) array of int
        Observations compared.
    z : (k,) array
        ``tau`` over its standard deviation under independence.
    weights : (k,) array
        Re-weighted neighbor weights, ``similarity * exp(strength * z)``,
        normalised to sum to 1.
    """

    tau: np.ndarray
    n_matched: np.ndarray
    z: np.ndarray
    weights: np.ndarray

    def to_frame(self) -> pd.DataFrame:
        """One row per neighbor."""
        return pd.DataFrame({"tau": self.tau, "n_matched": self.n_matched, "z": self.z, "weight": self.weights})


def _encode(space, configs: Sequence[Mapping]) -> np.ndarray:
    return space.encode([space.align(c).config for c in configs])


def _unit_distances(space, A: np.ndarray, B: np.ndarray) -> np.ndarray:
    """Squared distances (m, n) in the unit cube: choices differ by 0 or 1, an
    inactive or missing coordinate matches only another missing one."""
    diff = A[:, None, :] - B[None, :, :]
    choice = np.asarray(space.is_choice, dtype=bool)
    diff[..., choice] = (diff[..., choice] != 0).astype(float)
    a_nan = np.isnan(A)[:, None, :]
    b_nan = np.isnan(B)[None, :, :]
    diff = np.where(a_nan & b_nan, 0.0, np.where(a_nan | b_nan, 1.0, diff))
    return np.einsum("mnd,mnd->mn", diff, diff)


def _trials_of(item: Any) -> tuple[list, np.ndarray]:
    if isinstance(item, pd.DataFrame):
        configs, scores = list(item["config"]), item["score"].to_numpy(dtype=float, na_value=np.nan)
    else:
        configs, scores = list(item[0]), np.asarray(item[1], dtype=float)
    ok = np.isfinite(scores)
    return [c for c, good in zip(configs, ok) if good], scores[ok]


def rank_agreement(
    space,
    configs: Sequence[Mapping],
    scores: Sequence[float],
    neighbor_trials: Sequence[Any],
    maximize: bool = True,
    neighbor_maximize: bool | Sequence[bool] = True,
    similarity: Sequence[float] | None = None,
    strength: float = 1.0,
) -> Agreement:
    """Re-weight candidate neighbors by how well their recorded scores rank the
    new study's first observations.

    Each observed config is matched to the nearest config a neighbor
    evaluated (in the unit cube of ``space``; configs from other spaces are
    aligned by parameter name first); Kendall's tau-b
    (:func:`scipy.stats.kendalltau`) between the observed scores and the
    matched neighbor scores measures agreement. Its z-value under
    independence, ``tau / sqrt(2 (2n + 5) / (9 n (n - 1)))``, turns it into
    evidence that grows with the number of observations.

    Parameters
    ----------
    space : Space
        The new study's space.
    configs, scores : sequences
        The new study's observations so far (failed = NaN are ignored).
    neighbor_trials : sequence
        Per neighbor, a DataFrame with ``config`` (dict) and ``score`` columns
        (as :meth:`Archive.trials` returns) or a ``(configs, scores)`` pair.
    maximize : bool, default True
        Direction of the new study.
    neighbor_maximize : bool or sequence of bool, default True
        Direction of each neighbor study.
    similarity : sequence of float, optional
        Prior weights of the neighbors (e.g. profile similarity); 1 each by default.
    strength : float, default 1.0
        How strongly agreement moves the weights.

    Returns
    -------
    Agreement
    """
    from scipy.stats import kendalltau

    k = len(neighbor_trials)
    dirs = [neighbor_maximize] * k if isinstance(neighbor_maximize, (bool, np.bool_)) else list(neighbor_maximize)
    sim = np.ones(k) if similarity is None else np.asarray(similarity, dtype=float)
    if len(dirs) != k or sim.shape != (k,):
        raise ProfileError(
            f"neighbor_maximize and similarity need one entry per neighbor ({k}); got {len(dirs)} and {sim.size}"
        )
    obs = np.asarray(scores, dtype=float)
    if len(configs) != obs.size:
        raise ProfileError(f"configs and scores differ in length: {len(configs)} vs {obs.size}")
    keep = np.isfinite(obs)
    obs_configs = [c for c, good in zip(configs, keep) if good]
    obs = obs[keep] if maximize else -obs[keep]
    A = _encode(space, obs_configs) if obs_configs else np.empty((0, space.dim))
    tau, n_matched = np.zeros(k), np.zeros(k, dtype=int)
    for i, item in enumerate(neighbor_trials):
        nb_configs, nb_scores = _trials_of(item)
        if len(obs) < 3 or not nb_configs:
            continue
        B = _encode(space, nb_configs)
        nearest = np.argmin(_unit_distances(space, A, B), axis=1)
        predicted = nb_scores[nearest] if dirs[i] else -nb_scores[nearest]
        n_matched[i] = len(obs)
        if np.ptp(predicted) == 0 or np.ptp(obs) == 0:
            continue
        t = kendalltau(obs, predicted).statistic
        tau[i] = t if np.isfinite(t) else 0.0
    n = n_matched.astype(float)
    with np.errstate(divide="ignore", invalid="ignore"):
        sd = np.sqrt(2 * (2 * n + 5) / (9 * n * (n - 1)))
        z = np.where(n >= 3, tau / sd, 0.0)
    raw = sim * np.exp(strength * (z - z.max(initial=0.0)))
    weights = raw / raw.sum() if raw.sum() > 0 else np.full(k, 1.0 / max(k, 1))
    return Agreement(tau=tau, n_matched=n_matched, z=z, weights=weights)
