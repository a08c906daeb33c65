"""The library-default baseline: scikit-learn's defaults mapped into a space,
then a cold search.

References: the default values are read from scikit-learn's own estimators
(``get_params()``), not from our table; the data-dependent rules (SVC's
gamma='scale', the forest's max_features='sqrt') are checked against the
estimators fitted by scikit-learn on its bundled iris data.
"""

import math

import pytest
from sklearn.datasets import load_iris
from sklearn.ensemble import HistGradientBoostingClassifier, RandomForestClassifier
from sklearn.neighbors import KNeighborsClassifier
from sklearn.preprocessing import StandardScaler
from sklearn.svm import SVC

from warmstart.evaluate.learners import LEARNERS, get_learner
from warmstart.search.default_first import DefaultFirstSearch, library_default
from warmstart.search.strategy import SearchError, run_search
from warmstart.search.testfunctions import branin
from warmstart.space import Space

IRIS_PROFILE = {"log_features": math.log(4)}


def test_defaults_are_scikit_learns():
    for learner, estimator in (("gbt", HistGradientBoostingClassifier()), ("knn", KNeighborsClassifier())):
        space = LEARNERS[learner]["classification"].space
        d = library_default(get_learner(learner, "classification").defaults, space, IRIS_PROFILE)
        params = estimator.get_params()
        for name, value in d.config.items():
            if name in d.clipped or name not in params:
                continue
            assert value == pytest.approx(params[name]), name
    gbt = library_default(get_learner("gbt", "classification").defaults, LEARNERS["gbt"]["classification"].space)
    # scikit-learn's l2_regularization default 0 lies below the space's lower bound
    assert gbt.clipped == ("l2_regularization",)
    assert gbt.config["l2_regularization"] == LEARNERS["gbt"]["classification"].space["l2_regularization"].low
    assert "clipped into the space: l2_regularization" in gbt.notes()


def test_data_dependent_defaults_follow_scikit_learn_on_iris():
    X, y = load_iris(return_X_y=True)
    Xs = StandardScaler().fit_transform(X)
    svm = library_default(get_learner("svm", "classification").defaults, LEARNERS["svm"]["classification"].space, IRIS_PROFILE)
    fitted = SVC().fit(Xs, y)
    assert svm.config["gamma"] == pytest.approx(fitted._gamma, rel=1e-9)  # 1 / (4 features * variance 1)
    forest = library_default(get_learner("forest", "classification").defaults, LEARNERS["forest"]["classification"].space, IRIS_PROFILE)
    trees = RandomForestClassifier(n_estimators=3, random_state=0).fit(Xs, y)
    assert forest.config["max_features"] * 4 == pytest.approx(trees.estimators_[0].max_features_)
    with pytest.raises(SearchError, match="gamma='scale' needs the task's profile"):
        library_default(get_learner("svm", "classification").defaults, LEARNERS["svm"]["classification"].space)


def test_default_first_then_cold_search():
    f = branin()
    result = run_search(DefaultFirstSearch(f.space, {"x1": 0.0, "x2": 0.0}, seed=0, maximize=False), f, 12)
    assert result.configs[0] == {"x1": 0.0, "x2": 0.0}
    assert result.trials[0].source == "default" and result.trials[1].source != "default"
    assert len({f.space.canonical_json(c) for c in result.configs}) == 12
    with pytest.raises(Exception, match="x1"):
        DefaultFirstSearch(f.space, {"x1": 100.0, "x2": 0.0})


def test_a_missing_default_takes_the_centre():
    space = Space.from_dict({"params": {"n_neighbors": {"type": "integer", "low": 1, "high": 100, "log": True},
                                        "leaf": {"type": "real", "low": 0.0, "high": 2.0}}})
    d = library_default(get_learner("knn", "classification").defaults, space)
    assert d.missing == ("leaf",) and d.config["leaf"] == pytest.approx(1.0)
    assert d.config["n_neighbors"] == 5
