"""Built-in learners and the cross-validated objective.

Outside references: scikit-learn's bundled datasets (iris, diabetes, breast
cancer) and its metric functions / estimators, named beside each check.
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from sklearn import metrics as skm
from sklearn.datasets import load_breast_cancer, load_diabetes, load_iris
from sklearn.exceptions import ConvergenceWarning
from sklearn.linear_model import LogisticRegression, Ridge
from sklearn.neural_network import MLPClassifier
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler

from warmstart.evaluate.learners import (
    LEARNERS,
    METRICS,
    build_estimator,
    cv_objective,
    default_metric,
    default_space,
    get_learner,
    metric_direction,
    prepare_features,
)
from warmstart.evaluate.objective import ObjectiveError
from warmstart.space import Space


pytestmark = pytest.mark.usefixtures("one_blas_thread")


@pytest.fixture(scope="module")
def iris() -> pd.DataFrame:
    return load_iris(as_frame=True).frame


@pytest.fixture(scope="module")
def diabetes() -> pd.DataFrame:
    return load_diabetes(as_frame=True).frame


@pytest.fixture(scope="module")
def cancer() -> pd.DataFrame:
    return load_breast_cancer(as_frame=True).frame


def _midpoint(space: Space) -> dict:
    """The config at the centre of the unit cube (every range's middle)."""
    return space.decode(np.full((1, space.dim), 0.5))[0]


PAIRS = [(key, kind) for key, by_kind in LEARNERS.items() for kind in by_kind]


@pytest.mark.parametrize("key,kind", PAIRS)
def test_every_learner_builds_and_scores(key, kind, iris, diabetes):
    frame = iris if kind == "classification" else diabetes
    objective = cv_objective(frame, "target", key, kind=kind, cv=3, seed=0)
    result = objective(_midpoint(default_space(key, kind)))
    assert result.status == "ok", result.error
    assert len(result.fold_scores) == 3
    if kind == "classification":
        # reference: iris is nearly separable; common classifiers reach ~0.95
        # cross-validated accuracy (from memory)
        assert result.score >= 0.9
    else:
        # reference: diabetes; linear models reach R^2 about 0.45-0.5 (from
        # memory); the mean predictor scores <= 0 out of sample
        assert result.score > 0.2


def test_default_spaces_are_valid_and_documented():
    for key, kind in PAIRS:
        learner = get_learner(key, kind)
        space = learner.space
        assert space.learner == key
        assert set(space.names) <= set(learner.defaults)
        for config in space.sample(5, rng=1):
            space.validate(config)


def test_logistic_pipeline_and_metrics_equal_sklearn_on_same_folds(iris, cancer):
    # reference: sklearn StandardScaler + LogisticRegression scored with
    # sklearn.metrics functions on the objective's own folds
    for frame, metrics in (
        (cancer, ["accuracy", "balanced_accuracy", "roc_auc", "log_loss", "f1_macro"]),
        (iris, ["accuracy", "roc_auc", "log_loss", "f1_macro"]),
    ):
        X = frame.drop(columns="target").to_numpy()
        y = frame["target"].to_numpy()
        labels = np.unique(y)
        for metric in metrics:
            objective = cv_objective(frame, "target", "logreg", metric=metric, cv=4, seed=3)
            got = objective({"C": 0.5, "class_weight": "none"})
            assert got.status == "ok", got.error
            expected = []
            for train, test in objective.folds:
                model = make_pipeline(StandardScaler(), LogisticRegression(C=0.5, max_iter=1000))
                model.fit(X[train], y[train])
                pred, proba = model.predict(X[test]), model.predict_proba(X[test])
                if metric == "accuracy":
                    expected.append(skm.accuracy_score(y[test], pred))
                elif metric == "balanced_accuracy":
                    expected.append(skm.balanced_accuracy_score(y[test], pred))
                elif metric == "f1_macro":
                    expected.append(skm.f1_score(y[test], pred, average="macro"))
                elif metric == "log_loss":
                    expected.append(skm.log_loss(y[test], proba, labels=labels))
                elif len(labels) == 2:
                    expected.append(skm.roc_auc_score(y[test], proba[:, 1]))
                else:
                    expected.append(skm.roc_auc_score(y[test], proba, multi_class="ovr"))
            np.testing.assert_allclose(got.fold_scores, expected, rtol=1e-6)
            assert got.score == pytest.approx(np.mean(expected), rel=1e-6)


def test_ridge_pipeline_and_regression_metrics_equal_sklearn(diabetes):
    # reference: sklearn StandardScaler + Ridge (ridge is linear in y, so a
    # standardised target gives the same predictions) and sklearn.metrics
    X = diabetes.drop(columns="target").to_numpy()
    y = diabetes["target"].to_numpy()
    for metric, fn in (
        ("r2", skm.r2_score),
        ("rmse", skm.root_mean_squared_error),
        ("mae", skm.mean_absolute_error),
    ):
        objective = cv_objective(diabetes, "target", "ridge", metric=metric, cv=5, seed=1)
        got = objective({"alpha": 3.0})
        expected = []
        for train, test in objective.folds:
            model = make_pipeline(StandardScaler(), Ridge(alpha=3.0)).fit(X[train], y[train])
            expected.append(fn(y[test], model.predict(X[test])))
        np.testing.assert_allclose(got.fold_scores, expected, rtol=1e-6)
    # rmse and mae are natural (positive) errors, minimised
    assert not metric_direction("rmse") and not metric_direction("mae") and not metric_direction("log_loss")
    assert metric_direction("r2") and metric_direction("roc_auc")


def test_folds_are_stratified_and_fixed(iris):
    # reference: sklearn.model_selection.StratifiedKFold keeps class shares per fold
    objective = cv_objective(iris, "target", "knn", cv=5, seed=7)
    again = cv_objective(iris, "target", "knn", cv=5, seed=7)
    for (tr1, te1), (tr2, te2) in zip(objective.folds, again.folds):
        np.testing.assert_array_equal(te1, te2)
        assert np.bincount(iris["target"].to_numpy()[te1]).tolist() == [10, 10, 10]
    config = {"n_neighbors": 9, "weights": "distance", "p": 2}
    assert objective(config).score == again(config).score


def test_svm_probability_metrics_work(iris, cancer):
    # SVC has no predict_proba without calibration; log_loss and multi-class
    # AUC go through sklearn.calibration.CalibratedClassifierCV
    config = {"C": 1.0, "gamma": 0.1}
    for frame, metric in ((iris, "log_loss"), (iris, "roc_auc"), (cancer, "roc_auc")):
        result = cv_objective(frame, "target", "svm", metric=metric, cv=3)(config)
        assert result.status == "ok", result.error
        if metric == "roc_auc":
            assert 0.9 < result.score <= 1.0  # reference: AUC lies in [0, 1]; both sets are easy
        else:
            assert 0 < result.score < math.log(3)  # reference: log loss of the uniform guess is ln 3


def test_failing_config_becomes_failed_trial(iris):
    # reference: sklearn's parameter validation rejects p=0 for KNeighbors
    space = Space.from_dict({"params": {
        "n_neighbors": {"type": "integer", "low": 1, "high": 5},
        "p": {"type": "choice", "choices": [0]},
    }})
    objective = cv_objective(iris, "target", "knn", cv=3, space=space)
    result = objective({"n_neighbors": 3, "p": 0})
    assert result.status == "failed" and result.score is None
    assert "InvalidParameterError" in result.error and "'p'" in result.error
    assert result.cost_s >= 0 and result.finished_at >= result.started_at
    # a config outside the space is a failed trial too, naming the parameter
    bad = objective({"n_neighbors": 99, "p": 0})
    assert bad.status == "failed" and "n_neighbors" in bad.error and "out of range" in bad.error


def test_time_limit_fails_trial(cancer):
    # the trial runs in a child process stopped at the limit (more in tests/test_time_limit.py)
    objective = cv_objective(cancer, "target", "knn", cv=5, time_limit=1e-6)
    config = _midpoint(default_space("knn", "classification"))
    result = objective(config)
    assert result.status == "failed"
    assert result.error.startswith("trial exceeded its time limit of 1e-06 s (stopped ")
    objective.close()
    relaxed = cv_objective(cancer, "target", "knn", cv=5, time_limit=600)
    assert relaxed(config).status == "ok"
    relaxed.close()
    with pytest.raises(ObjectiveError, match="time_limit must be a positive number"):
        cv_objective(cancer, "target", "forest", time_limit=0)


def test_convergence_warnings_do_not_escape(iris):
    # reference: sklearn's MLPClassifier warns ConvergenceWarning at max_iter=5
    X, y = iris.drop(columns="target"), iris["target"]
    with pytest.warns(ConvergenceWarning, match="Maximum iterations"):
        MLPClassifier(max_iter=5, random_state=0).fit(X, y)
    space = Space.from_dict({"params": {"learning_rate_init": {"type": "real", "low": 1e-6, "high": 2e-6}}})
    objective = cv_objective(iris, "target", "mlp", cv=3, space=space)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        result = objective({"learning_rate_init": 1e-6})
    assert result.status == "ok"


def test_mixed_columns_missing_values_and_rare_levels():
    # reference: sklearn OneHotEncoder caps columns at max_categories (32 here)
    rng = np.random.default_rng(0)
    n = 300
    x = rng.normal(size=n)
    frame = pd.DataFrame({
        "x": np.where(rng.random(n) < 0.1, np.nan, x),
        "flag": rng.random(n) < 0.5,
        "when": pd.date_range("2020-01-01", periods=n, freq="D"),
        "shop": pd.Series([f"s{i}" for i in rng.integers(0, 200, n)], dtype="str"),
        "colour": pd.Series(rng.choice(["red", "green", None], n), dtype="category"),
        "target": np.where(x > 0, "yes", "no"),
    })
    est = build_estimator("logreg", "classification", {"C": 1.0}).fit(frame.drop(columns="target").pipe(prepare_features), frame["target"])
    onehot = est.named_steps["prepare"].named_transformers_["categorical"].named_steps["onehot"]
    assert [len(c) for c in onehot.get_feature_names_out()] and len(onehot.get_feature_names_out()) <= 32 + 4
    result = cv_objective(frame, "target", "logreg", cv=5)({"C": 1.0, "class_weight": "balanced"})
    assert result.status == "ok", result.error
    assert result.score > 0.8  # x decides the class; 10 % of x are missing


def test_prepare_features_datetimes_are_epoch_seconds():
    # reference: datetime.timestamp() of the standard library
    from datetime import datetime, timezone

    moments = [datetime(2024, 2, 29, 12, 30, tzinfo=timezone.utc), datetime(1999, 12, 31, tzinfo=timezone.utc)]
    frame = pd.DataFrame({
        "naive": pd.Series([m.replace(tzinfo=None) for m in moments]).astype("datetime64[s]"),
        "aware": pd.Series(moments).dt.tz_convert("Europe/Paris"),
    })
    out = prepare_features(frame)
    expected = [m.timestamp() for m in moments]
    assert out["naive"].tolist() == expected and out["aware"].tolist() == expected


@settings(max_examples=30, deadline=None)
@given(st.lists(st.one_of(st.none(), st.integers(-5, 5), st.text(max_size=3)), min_size=1, max_size=20))
def test_prepare_features_invariants(values):
    frame = pd.DataFrame({"mixed": pd.Series(values, dtype=object), "num": np.arange(len(values), dtype=float)})
    out = prepare_features(frame)
    assert out.shape == frame.shape and list(out.index) == list(frame.index)
    np.testing.assert_array_equal(out["num"].to_numpy(), frame["num"].to_numpy())
    for before, after in zip(values, out["mixed"]):
        if before is None:
            assert after is np.nan or (isinstance(after, float) and math.isnan(after))
        else:
            assert after == str(before)


def test_bad_inputs_name_what_is_valid(iris, diabetes):
    with pytest.raises(ObjectiveError, match="unknown learner 'xgb'; built-in learners are: forest, gbt, knn"):
        get_learner("xgb", "classification")
    with pytest.raises(ObjectiveError, match="'logreg' is for classification tasks, not regression; use 'ridge'"):
        get_learner("logreg", "regression")
    with pytest.raises(ObjectiveError, match="task kind 'ranking' is not known"):
        default_space("svm", "ranking")
    with pytest.raises(ObjectiveError, match="unknown metric 'auc'; metrics are: accuracy, balanced_accuracy"):
        cv_objective(iris, "target", "svm", metric="auc")
    with pytest.raises(ObjectiveError, match="metric 'rmse' is for regression tasks; for classification use"):
        cv_objective(iris, "target", "svm", metric="rmse")
    with pytest.raises(ObjectiveError, match="target column 'label' not found; columns are: sepal length"):
        cv_objective(iris, "label", "svm")
    with pytest.raises(ObjectiveError, match="single class"):
        cv_objective(iris[iris["target"] == 0], "target", "svm", kind="classification")
    with pytest.raises(ObjectiveError, match="cv must be a whole number of folds between 2 and the 150 rows"):
        cv_objective(iris, "target", "svm", cv=1)
    with pytest.raises(ObjectiveError, match=r"no tunable parameter\(s\) \['kernel'\]; its parameters are: C, gamma"):
        cv_objective(iris, "target", "svm", space=Space.from_dict({"params": {"kernel": {"type": "choice", "choices": ["rbf"]}}}))
    with pytest.raises(ObjectiveError, match="regression target must be numeric"):
        cv_objective(iris.assign(target=iris["target"].astype(str)), "target", "ridge", kind="regression")
    assert default_metric("classification") == "accuracy" and default_metric("regression") == "r2"
    assert set(METRICS) == {"accuracy", "balanced_accuracy", "roc_auc", "log_loss", "f1_macro", "r2", "rmse", "mae"}
