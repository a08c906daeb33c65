"""Profiles: the meta-features that describe a task (a dataset plus a target).

A profile is a ``dict[str, float]`` in four groups (the published taxonomy of
meta-features: simple, statistical, information-theoretic, landmarking), with
a regression set of its own. Every value is finite, whatever the data: missing
values, categorical and text-like columns, constant and all-missing columns,
more features than rows, rare classes. Big data is subsampled with a fixed
seed, so a million rows take seconds; the simple group uses the full shape.

Choices (written down so the numbers can be reproduced):

- numeric columns: moments on the non-missing values; for correlation, PCA and
  the landmarkers they are standardised (population standard deviation) and
  missing values become the column mean (0 after standardising);
- categorical (string, category, boolean, object) columns: one-hot when they
  have at most ``ONE_HOT_LEVELS`` levels, else the share of the row's level;
- information measures use discrete codes: numeric columns in ``N_BINS``
  equal-frequency bins by rank (ties share a bin), categoricals as their
  ``N_BINS`` most frequent levels plus "other"; missing is a code of its own;
  entropies in nats;
- landmarkers: ``CV_FOLDS``-fold cross-validation (stratified when every class
  has enough rows) with a fixed seed; a fold whose model cannot be fitted
  scores the training-fold baseline (majority class / mean).
"""

from __future__ import annotations

import math
import warnings
from typing import Callable

import numpy as np
import pandas as pd
from pandas.api import types as ptypes

from warmstart.errors import ProfileError
from warmstart.data.clean import clean_table
from warmstart.data.read import TableError, column_not_found
from warmstart.space import plain_value

__all__ = [
    "PROFILE_VERSION",
    "FEATURE_GROUPS",
    "COUNT_FEATURES",
    "profile",
    "profile_kind",
    "detect_kind",
]

PROFILE_VERSION = "2"  # 2: identifier columns left out, dates written as text as days (tables.feature_frame)
SUBSAMPLE_ROWS = 3000  # rows for the statistical, information and landmarking groups
MAX_COLUMNS = 100  # feature columns used by those groups (a seeded choice when more)
N_BINS = 10  # equal-frequency bins for information measures (common practice)
ONE_HOT_LEVELS = 8  # categoricals with at most this many levels are one-hot encoded
CV_FOLDS = 5
DISTINCT_FOR_REGRESSION = 20  # integer targets with more distinct values are regression (common practice)
MI_FLOOR = 1e-6  # nats; keeps ratios to mutual information finite

_SIMPLE = ["log_rows", "log_features", "log_rows_per_feature", "frac_categorical", "frac_missing"]
_CLASS_SIMPLE = ["log_classes", "class_entropy", "minority_class_share", "majority_class_share"]
_TARGET = ["target_skew", "target_kurtosis", "target_distinct_share", "target_outlier_share"]
_STATISTICAL = [
    "skew_abs_mean", "skew_abs_max", "kurtosis_abs_mean", "kurtosis_abs_max",
    "corr_abs_mean", "pca_first_share", "pca_95_share",
]
_TARGET_CORR = ["target_corr_abs_mean", "target_corr_abs_max"]
_INFO = ["feature_entropy_mean", "mutual_info_mean", "mutual_info_max", "equivalent_features_log", "noise_signal_log"]
_CLASS_LANDMARKS = ["landmark_1nn", "landmark_stump", "landmark_nb", "landmark_lda"]
_REG_LANDMARKS = ["landmark_1nn", "landmark_stump", "landmark_linear"]

#: meta-feature name -> group ("simple", "target", "statistical", "information", "landmarking")
FEATURE_GROUPS: dict[str, str] = {
    **{n: "simple" for n in _SIMPLE + _CLASS_SIMPLE},
    **{n: "target" for n in _TARGET},
    **{n: "statistical" for n in _STATISTICAL + _TARGET_CORR},
    **{n: "information" for n in _INFO},
    **{n: "landmarking" for n in _CLASS_LANDMARKS + _REG_LANDMARKS},
}
#: meta-features that are counts, already on a log scale
COUNT_FEATURES = ("log_rows", "log_features", "log_rows_per_feature", "log_classes")


def detect_kind(series: pd.Series) -> str:
    """Tell a classification target from a regression one.

    Strings, categories and booleans are classification; numbers are
    regression when they are not all integers (and take more than two
    values), or when they are integers with more than
    ``DISTINCT_FOR_REGRESSION`` distinct values.

    Parameters
    ----------
    series : pandas.Series
        The target column (missing values are ignored).

    Returns
    -------
    {"classification", "regression"}
    """
    s = series.dropna()
    if ptypes.is_bool_dtype(s) or not ptypes.is_numeric_dtype(s):
        return "classification"
    values = s.to_numpy(dtype=float, na_value=np.nan, copy=True)
    values = values[np.isfinite(values)]
    distinct = pd.unique(values)
    if distinct.size <= 2:
        return "classification"
    if not np.all(distinct == np.round(distinct)):
        return "regression"
    return "regression" if distinct.size > DISTINCT_FOR_REGRESSION else "classification"


def profile_kind(prof: dict) -> str:
    """Kind of task a profile describes (classification profiles count classes)."""
    return "classification" if "log_classes" in prof else "regression"


def profile(
    frame: pd.DataFrame,
    target: str,
    kind: str | None = None,
    seed: int = 0,
    progress: Callable[[str], None] | None = None,
    keep_columns=(),
) -> dict[str, float]:
    """Meta-features of a task (section 5 of the design).

    Parameters
    ----------
    frame : pandas.DataFrame
        The dataset, target column included. The profile sees the table
        :func:`warmstart.data.clean.clean_table` gives (the same table the
        cross-validated objective sees): identifier columns left out, dates
        written as text as days since 1970-01-01, rows without a target left
        out, text labels that differ only in case or surrounding spaces
        merged, infinite feature values missing.
    target : str
        Name of the target column.
    kind : {"classification", "regression"}, optional
        Task kind; detected with :func:`detect_kind` when not given.
    seed : int, default 0
        Seed of the subsample and of the cross-validation folds.
    progress : callable, optional
        Called with the name of each group before it is computed.
    keep_columns : iterable of str, default ()
        Columns to use as features exactly as they are, even when they look
        like identifiers or dates written as text.

    Returns
    -------
    dict of str to float
        Finite values, in a stable order; the names depend on the kind
        (see ``FEATURE_GROUPS``).

    Raises
    ------
    ProfileError
        Not a DataFrame, empty frame, no feature column (or every one left
        out as an identifier), missing target column or column to keep,
        target all missing, a single class (or a constant regression
        target), a non-numeric regression target, or an unknown kind.

    Examples
    --------
    >>> import pandas as pd
    >>> frame = pd.DataFrame({"x": [1.0, 2.0, 3.0, 4.0], "y": ["a", "b", "a", "b"]})
    >>> p = profile(frame, target="y")
    >>> p["log_classes"] == math.log(2)
    True
    """
    from threadpoolctl import threadpool_limits  # installed with scikit-learn

    frame = _features(frame, target, keep_columns)
    with threadpool_limits(limits=1):  # small matrices: one BLAS thread is faster and steadier
        return _profile(frame, target, kind, seed, progress or (lambda name: None))


def _features(frame: pd.DataFrame, target: str, keep_columns) -> pd.DataFrame:
    """The table as :func:`warmstart.data.clean.clean_table` gives it, with
    profile errors for what it refuses."""
    _check_input(frame, target)  # type, emptiness, target column: the messages of the table as given
    try:
        cleaned = clean_table(frame, target, keep_columns=keep_columns)
    except TableError as exc:
        raise ProfileError(str(exc)) from None
    table, notes = cleaned.frame, cleaned.column_notes
    if table.shape[1] == 1:
        raise ProfileError(
            f"every feature column was left out: {'; '.join(f'{c!r} {why}' for c, why in notes.items())}; "
            "pass the ones that are features with keep_columns (--keep-column on the command line)"
        )
    return table


def _profile(frame, target, kind, seed, step) -> dict[str, float]:
    y_full, features, keep = _check_input(frame, target)
    kind = kind or detect_kind(y_full)
    if kind not in ("classification", "regression"):
        raise ProfileError(f"kind must be 'classification' or 'regression', got {kind!r}")
    rng = np.random.default_rng(seed)
    y_full = y_full.iloc[keep] if keep is not None else y_full
    n = len(y_full)

    step("simple")
    out = _simple_group(frame, features, keep, n)
    if kind == "classification":
        codes, counts = _class_codes(y_full, target)
        out.update(_class_group(counts))
        rows = _subsample(n, rng, codes)
        y = codes[rows]
    else:
        values = _regression_target(y_full, target)
        step("target")
        out.update(_target_group(values))
        rows = _subsample(n, rng, None)
        y = values[rows]
    positions = rows if keep is None else keep[rows]
    cols = features if len(features) <= MAX_COLUMNS else [features[j] for j in np.sort(
        rng.choice(len(features), MAX_COLUMNS, replace=False))]
    sub = frame.iloc[positions, cols]

    step("statistical")
    numeric, categorical = _split_columns(sub)
    Z, stats = _statistical_group(numeric)
    out.update(stats)
    if kind == "regression":
        out.update(_target_correlation(Z, y))
    step("information")
    out.update(_information_group(numeric, categorical, y, kind))
    step("landmarking")
    design = np.hstack([Z, _encode_categoricals(categorical, Z.shape[0])])
    out.update(_landmark_group(design, y, kind, seed))
    result = {name: float(value) for name, value in out.items()}
    bad = [name for name, value in result.items() if not math.isfinite(value)]
    if bad:  # a defect, not a user error: every branch above must stay finite
        raise AssertionError(f"non-finite meta-features {bad}")
    return result


# -- input ------------------------------------------------------------------
def _check_input(frame: pd.DataFrame, target: str) -> tuple[pd.Series, list[int], np.ndarray | None]:
    if not isinstance(frame, pd.DataFrame):
        raise ProfileError(f"profile needs a pandas DataFrame, got {type(frame).__name__}")
    if frame.shape[0] == 0 or frame.shape[1] == 0:
        raise ProfileError(f"the table is empty ({frame.shape[0]} rows, {frame.shape[1]} columns); nothing to profile")
    hits = [j for j, c in enumerate(frame.columns) if c == target]
    if not hits:
        raise ProfileError(column_not_found(target, frame.columns))
    if len(hits) > 1:
        raise ProfileError(f"target column {target!r} appears {len(hits)} times; rename the duplicates")
    features = [j for j in range(frame.shape[1]) if j != hits[0]]
    if not features:
        raise ProfileError(f"the table has only the target column {target!r}; a profile needs feature columns")
    y = frame.iloc[:, hits[0]]
    missing = y.isna().to_numpy().copy()
    if ptypes.is_numeric_dtype(y) and not ptypes.is_bool_dtype(y):
        missing |= ~np.isfinite(y.to_numpy(dtype=float, na_value=np.nan, copy=True))
    if missing.all():
        raise ProfileError(f"target column {target!r} is missing in all {len(y)} rows")
    keep = np.flatnonzero(~missing) if missing.any() else None
    return y, features, keep


def _class_codes(y: pd.Series, target: str) -> tuple[np.ndarray, np.ndarray]:
    codes, uniques = pd.factorize(y, sort=True)
    if len(uniques) < 2:
        raise ProfileError(
            f"target column {target!r} has a single class ({plain_value(uniques[0])!r}); a classification task needs two or more"
        )
    return codes.astype(np.int64), np.bincount(codes)


def _regression_target(y: pd.Series, target: str) -> np.ndarray:
    if not ptypes.is_numeric_dtype(y) or ptypes.is_bool_dtype(y):
        raise ProfileError(f"target column {target!r} has dtype {y.dtype}; a regression target must be numeric")
    values = y.to_numpy(dtype=float, na_value=np.nan, copy=True)
    if np.ptp(values) == 0:
        raise ProfileError(f"target column {target!r} has a single value ({float(values[0])!r}); nothing to predict")
    return values


def _subsample(n: int, rng: np.random.Generator, codes: np.ndarray | None) -> np.ndarray:
    """Row positions of a seeded subsample; classes keep their shares and at
    least two rows each (when there are few enough classes)."""
    m = SUBSAMPLE_ROWS
    if n <= m:
        return np.arange(n)
    if codes is None or 2 * (codes.max() + 1) > m:
        return np.sort(rng.choice(n, m, replace=False))
    perm = rng.permutation(n)
    pc = codes[perm]
    counts = np.bincount(codes)
    quota = np.maximum(np.rint(counts * m / n), np.minimum(counts, 2)).astype(np.int64)
    order = np.argsort(pc, kind="stable")
    starts = np.searchsorted(pc[order], np.arange(counts.size))
    rank = np.empty(n, dtype=np.int64)
    rank[order] = np.arange(n) - starts[pc[order]]
    return np.sort(perm[rank < quota[pc]])


def _split_columns(sub: pd.DataFrame) -> tuple[np.ndarray, list[np.ndarray]]:
    """Numeric columns as an (m, p) float array with NaN; categoricals as
    integer codes by frequency rank (-1 = missing)."""
    numeric, categorical = [], []
    for j in range(sub.shape[1]):
        s = sub.iloc[:, j]
        if ptypes.is_datetime64_any_dtype(s) or ptypes.is_timedelta64_dtype(s):
            v = s.to_numpy(dtype="datetime64[ns]" if ptypes.is_datetime64_any_dtype(s) else "timedelta64[ns]")
            x = v.astype(np.int64).astype(float)
            x[s.isna().to_numpy()] = np.nan
            numeric.append(x)
        elif ptypes.is_numeric_dtype(s) and not ptypes.is_bool_dtype(s):
            x = s.to_numpy(dtype=float, na_value=np.nan, copy=True)
            x[~np.isfinite(x)] = np.nan
            numeric.append(x)
        else:
            codes, _ = pd.factorize(s.astype(str).where(s.notna()), use_na_sentinel=True)
            if codes.max(initial=-1) >= 0:  # relabel levels by frequency (most frequent = 0)
                counts = np.bincount(codes[codes >= 0])
                rank = np.empty(counts.size, dtype=np.int64)
                rank[np.argsort(-counts, kind="stable")] = np.arange(counts.size)
                codes = np.where(codes >= 0, rank[np.maximum(codes, 0)], -1)
            categorical.append(codes.astype(np.int64))
    m = sub.shape[0]
    N = np.column_stack(numeric) if numeric else np.empty((m, 0))
    return N, categorical


# -- groups -----------------------------------------------------------------
def _simple_group(frame: pd.DataFrame, features: list[int], keep: np.ndarray | None, n: int) -> dict:
    n_categorical, n_missing = 0, 0
    for j in features:
        s = frame.iloc[:, j]
        numeric = ptypes.is_numeric_dtype(s) and not ptypes.is_bool_dtype(s)
        n_categorical += not (numeric or ptypes.is_datetime64_any_dtype(s) or ptypes.is_timedelta64_dtype(s))
        miss = s.isna().to_numpy()
        n_missing += int(miss.sum() if keep is None else miss[keep].sum())
    d = len(features)
    return {
        "log_rows": math.log(n),
        "log_features": math.log(d),
        "log_rows_per_feature": math.log(n / d),
        "frac_categorical": n_categorical / d,
        "frac_missing": n_missing / (n * d),
    }


def _class_group(counts: np.ndarray) -> dict:
    k = counts.size
    share = counts / counts.sum()
    entropy = -np.sum(share * np.log(share))
    return {
        "log_classes": math.log(k),
        "class_entropy": entropy / math.log(k),
        "minority_class_share": share.min(),
        "majority_class_share": share.max(),
    }


def _target_group(y: np.ndarray) -> dict:
    skew, kurt = _moments(y[:, None])
    q1, q3 = np.quantile(y, [0.25, 0.75])
    fence = 1.5 * (q3 - q1)  # Tukey's fences (common practice)
    outside = (y < q1 - fence) | (y > q3 + fence)
    return {
        "target_skew": float(skew[0]) if skew.size else 0.0,
        "target_kurtosis": float(kurt[0]) if kurt.size else 0.0,
        "target_distinct_share": pd.unique(y).size / y.size,
        "target_outlier_share": float(outside.mean()),
    }


def _moments(N: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Skewness and excess kurtosis (biased, as scipy.stats defaults) of the
    columns with at least three values and non-zero spread."""
    valid = ~np.isnan(N)
    cnt = valid.sum(axis=0)
    scale = np.nanmax(np.abs(np.where(valid, N, 0.0)), axis=0, initial=0.0)
    scale[scale == 0] = 1.0
    X = np.where(valid, N / scale, 0.0)  # scale-free: avoids overflow of the fourth power
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = X.sum(axis=0) / np.maximum(cnt, 1)
        d = np.where(valid, X - mean, 0.0)
        m2 = (d**2).sum(axis=0) / np.maximum(cnt, 1)
        ok = (cnt >= 3) & (m2 > (np.finfo(float).eps * mean) ** 2) & (m2 > 0)
        z = d[:, ok] / np.sqrt(m2[ok])
        skew = (z**3).sum(axis=0) / cnt[ok]
        kurt = (z**4).sum(axis=0) / cnt[ok] - 3.0
    return skew, kurt


def _standardize(N: np.ndarray) -> np.ndarray:
    """Columns with spread, standardised; missing values become 0 (the mean)."""
    valid = ~np.isnan(N)
    cnt = np.maximum(valid.sum(axis=0), 1)
    scale = np.max(np.abs(np.where(valid, N, 0.0)), axis=0, initial=0.0)
    N = N / np.where(scale > 0, scale, 1.0)  # scale-free: no overflow in the squares
    mean = np.where(valid, N, 0.0).sum(axis=0) / cnt
    d = np.where(valid, N - mean, 0.0)
    sd = np.sqrt((d**2).sum(axis=0) / cnt)
    ok = sd > 1e-12 * np.maximum(np.abs(mean), 1.0)
    return d[:, ok] / sd[ok]


def _statistical_group(N: np.ndarray) -> tuple[np.ndarray, dict]:
    skew, kurt = _moments(N)
    Z = _standardize(N)
    m, p = Z.shape
    out = {
        "skew_abs_mean": np.abs(skew).mean() if skew.size else 0.0,
        "skew_abs_max": np.abs(skew).max() if skew.size else 0.0,
        "kurtosis_abs_mean": np.abs(kurt).mean() if kurt.size else 0.0,
        "kurtosis_abs_max": np.abs(kurt).max() if kurt.size else 0.0,
        "corr_abs_mean": 0.0,
        "pca_first_share": 1.0,
        "pca_95_share": 1.0,
    }
    if p >= 2:
        corr = np.clip((Z.T @ Z) / m, -1.0, 1.0)
        out["corr_abs_mean"] = np.abs(corr[np.triu_indices(p, 1)]).mean()
    if p >= 1 and m >= 2:
        var = np.linalg.svd(Z - Z.mean(axis=0), compute_uv=False) ** 2
        if var.sum() > 0:
            ratio = var / var.sum()
            out["pca_first_share"] = ratio[0]
            # same rule as sklearn.decomposition.PCA(n_components=0.95)
            out["pca_95_share"] = min(int(np.searchsorted(np.cumsum(ratio), 0.95, side="right")) + 1, p) / p
    return Z, out


def _target_correlation(Z: np.ndarray, y: np.ndarray) -> dict:
    sd = y.std()
    if Z.shape[1] == 0 or sd == 0:
        return {"target_corr_abs_mean": 0.0, "target_corr_abs_max": 0.0}
    r = np.abs(np.clip(Z.T @ ((y - y.mean()) / sd) / len(y), -1.0, 1.0))
    return {"target_corr_abs_mean": r.mean(), "target_corr_abs_max": r.max()}


def discretize(N: np.ndarray, bins: int = N_BINS) -> np.ndarray:
    """Equal-frequency bin codes of numeric columns (ties share a bin;
    missing values get code ``bins``)."""
    from scipy.stats import rankdata

    if N.size == 0:
        return np.empty(N.shape, dtype=np.int64)
    missing = np.isnan(N)
    ranks = rankdata(np.where(missing, np.inf, N), axis=0, method="average")
    cnt = np.maximum((~missing).sum(axis=0), 1)
    codes = np.floor((ranks - 0.5) * bins / cnt).astype(np.int64)
    return np.where(missing, bins, np.clip(codes, 0, bins - 1))


def entropy_and_mutual_info(X: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Entropy of each discrete column of X and its mutual information with
    the discrete y (nats, plug-in estimates)."""
    n, p = X.shape
    _, yc = np.unique(y, return_inverse=True)
    k = yc.max() + 1
    py = np.bincount(yc, minlength=k) / n
    hy = -np.sum(py[py > 0] * np.log(py[py > 0]))
    H, MI = np.zeros(p), np.zeros(p)
    for j in range(p):
        _, xc = np.unique(X[:, j], return_inverse=True)
        joint = np.bincount(xc * k + yc).astype(float) / n
        joint = joint[joint > 0]
        px = np.bincount(xc) / n
        hx = -np.sum(px * np.log(px))
        hxy = -np.sum(joint * np.log(joint))
        H[j] = hx
        MI[j] = max(hx + hy - hxy, 0.0)
    return H, MI


def _information_group(N: np.ndarray, categorical: list[np.ndarray], y: np.ndarray, kind: str) -> dict:
    cats = [np.where(c >= N_BINS, N_BINS, c) for c in categorical]  # top levels, then "other"
    X = np.column_stack([discretize(N)] + [c[:, None] for c in cats]) if (N.size or cats) else np.empty((len(y), 0))
    ycodes = y if kind == "classification" else discretize(y[:, None])[:, 0]
    if X.shape[1] == 0:
        return dict.fromkeys(_INFO, 0.0)
    H, MI = entropy_and_mutual_info(X, ycodes)
    _, hy = entropy_and_mutual_info(ycodes[:, None], ycodes)
    mi = max(MI.mean(), MI_FLOOR)
    return {
        "feature_entropy_mean": H.mean(),
        "mutual_info_mean": MI.mean(),
        "mutual_info_max": MI.max(),
        "equivalent_features_log": math.log(max(hy[0], MI_FLOOR) / mi),
        "noise_signal_log": math.log1p(max(H.mean() - MI.mean(), 0.0) / mi),
    }


def _encode_categoricals(categorical: list[np.ndarray], m: int) -> np.ndarray:
    blocks = []
    for codes in categorical:
        levels = codes.max(initial=-1) + 1
        if levels == 0:
            continue
        if levels <= ONE_HOT_LEVELS:
            block = (codes[:, None] == np.arange(-1 if (codes < 0).any() else 0, levels)).astype(float)
        else:  # high cardinality: share of the row's level
            share = np.bincount(codes[codes >= 0], minlength=levels) / m
            block = np.where(codes >= 0, share[np.maximum(codes, 0)], 0.0)[:, None]
        blocks.append(block)
    if not blocks:
        return np.empty((m, 0))
    return _standardize(np.hstack(blocks))


def _cv_splits(y: np.ndarray, kind: str, seed: int) -> list[tuple[np.ndarray, np.ndarray]]:
    """Fold indices: stratified when every class has ``CV_FOLDS`` rows, else
    shuffled K-fold; no folds at all for fewer than four rows."""
    from sklearn.model_selection import KFold, StratifiedKFold

    n = len(y)
    if n < 4:
        return []
    folds = min(CV_FOLDS, n // 2)
    if kind == "classification" and np.bincount(y).min(initial=n) >= folds:
        splitter = StratifiedKFold(folds, shuffle=True, random_state=seed)
    else:
        splitter = KFold(folds, shuffle=True, random_state=seed)
    return list(splitter.split(np.zeros((n, 1)), y))


def _landmark_models(kind: str, seed: int) -> dict:
    from sklearn.discriminant_analysis import LinearDiscriminantAnalysis
    from sklearn.linear_model import LinearRegression
    from sklearn.naive_bayes import GaussianNB
    from sklearn.neighbors import KNeighborsClassifier, KNeighborsRegressor
    from sklearn.tree import DecisionTreeClassifier, DecisionTreeRegressor

    if kind == "classification":
        return {
            "landmark_1nn": lambda: KNeighborsClassifier(n_neighbors=1),
            "landmark_stump": lambda: DecisionTreeClassifier(max_depth=1, random_state=seed),
            "landmark_nb": lambda: GaussianNB(),
            "landmark_lda": lambda: LinearDiscriminantAnalysis(),
        }
    return {
        "landmark_1nn": lambda: KNeighborsRegressor(n_neighbors=1),
        "landmark_stump": lambda: DecisionTreeRegressor(max_depth=1, random_state=seed),
        "landmark_linear": lambda: LinearRegression(),
    }


def _fold_score(y_true: np.ndarray, y_pred: np.ndarray, kind: str) -> float:
    """Accuracy, or R^2 (1 for a perfect fit of a constant fold, else 0 there,
    as sklearn.metrics.r2_score does)."""
    if kind == "classification":
        return float(np.mean(y_true == y_pred))
    ss_res = float(np.sum((y_true - y_pred) ** 2))
    ss_tot = float(np.sum((y_true - y_true.mean()) ** 2))
    if ss_tot == 0:
        return 1.0 if ss_res == 0 else 0.0
    return 1.0 - ss_res / ss_tot


def _baseline(y_train: np.ndarray, size: int, kind: str) -> np.ndarray:
    if kind == "classification":
        return np.full(size, np.bincount(y_train).argmax())
    return np.full(size, y_train.mean())


def _landmark_group(D: np.ndarray, y: np.ndarray, kind: str, seed: int) -> dict:
    """Mean cross-validated accuracy (classification) or R^2 clipped to
    [-1, 1] (regression) of cheap models on the standardised design matrix."""
    if D.shape[1] == 0:
        D = np.zeros((len(y), 1))
    if kind == "regression":
        y = (y - y.mean()) / (y.std() or 1.0)
    models = _landmark_models(kind, seed)
    splits = _cv_splits(y, kind, seed)
    scores = {name: [] for name in models}
    for train, test in splits:
        for name, make in models.items():
            try:
                with warnings.catch_warnings():
                    # collinear or constant columns are expected on messy data
                    warnings.simplefilter("ignore")
                    pred = make().fit(D[train], y[train]).predict(D[test])
                if not np.all(np.isfinite(pred)):
                    raise ValueError("non-finite predictions")
            except Exception:  # a model that cannot fit degenerate data scores the baseline
                pred = _baseline(y[train], len(test), kind)
            scores[name].append(_fold_score(y[test], pred, kind))
    out = {}
    for name, values in scores.items():
        if values:
            out[name] = float(np.mean(values))
        elif kind == "classification":
            out[name] = float(np.bincount(y).max() / len(y))
        else:
            out[name] = 0.0
        if kind == "regression":
            out[name] = min(max(out[name], -1.0), 1.0)
    return out
