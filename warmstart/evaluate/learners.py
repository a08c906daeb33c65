"""Built-in scikit-learn learners, their default spaces, and the
cross-validated objective.

Learner keys (DESIGN §2): ``svm``, ``gbt``, ``forest``, ``knn``, ``mlp`` exist
for both kinds of task; ``logreg`` is for classification and ``ridge`` for
regression (asking for one on the other kind of task is an error that names
the right key). Every estimator sits in a pipeline that imputes missing
values, one-hot encodes categorical columns (unknown levels ignored, rare
levels grouped) and standardises numeric columns; regressors also
standardise the target, so ranges such as SVR's ``epsilon`` are in units of
the target's standard deviation.

The default ranges are common practice (rules of thumb widely used by
practitioners; the SVM ranges follow the grid of the libsvm practical guide,
from memory). They are starting points: pass a space file to change them.
"""

from __future__ import annotations

import copy
import math
import time
import warnings
from dataclasses import dataclass, field
from typing import Any, Callable, Mapping

import numpy as np
import pandas as pd
from pandas.api import types as ptypes

from warmstart.evaluate.deadline import StoppableRunner
from warmstart.evaluate.metrics import METRICS, metric_direction
from warmstart.evaluate.result import ObjectiveError, TrialResult, check_time_limit, error_text, utc_now
from warmstart.profile import detect_kind
from warmstart.space import Space, plain_value
from warmstart.data.clean import clean_table
from warmstart.data.read import TableError

__all__ = [
    "Learner",
    "LEARNERS",
    "METRICS",
    "CVObjective",
    "build_estimator",
    "cv_objective",
    "default_metric",
    "default_space",
    "get_learner",
    "metric_direction",
    "prepare_features",
]

TASK_KINDS = ("classification", "regression")

_DEFAULT_METRIC = {"classification": "accuracy", "regression": "r2"}

# one-hot encoding of categoricals: levels seen in < 1 % of rows are grouped,
# at most 32 columns per feature (common practice)
ONEHOT_MIN_FREQUENCY = 0.01
ONEHOT_MAX_CATEGORIES = 32


def _real(low: float, high: float, log: bool = False, **extra: Any) -> dict:
    return {"type": "real", "low": low, "high": high, "log": log, **extra}


def _int(low: int, high: int, log: bool = False, **extra: Any) -> dict:
    return {"type": "integer", "low": low, "high": high, "log": log, **extra}


def _choice(*levels: Any, **extra: Any) -> dict:
    return {"type": "choice", "choices": list(levels), **extra}


# -- default spaces (all ranges common practice) -----------------------------
_SVM_C = _real(2.0**-5, 2.0**15, log=True)  # libsvm guide grid, from memory
_SVM_GAMMA = _real(2.0**-15, 2.0**3, log=True)  # libsvm guide grid, from memory
_GBT = {
    "learning_rate": _real(0.01, 1.0, log=True),
    "max_iter": _int(20, 500, log=True),
    "max_leaf_nodes": _int(4, 128, log=True),
    "min_samples_leaf": _int(2, 200, log=True),
    "l2_regularization": _real(1e-6, 10.0, log=True),
    "max_features": _real(0.2, 1.0),
}
_FOREST = {
    "n_estimators": _int(50, 300, log=True),
    "max_features": _real(0.05, 1.0),
    "min_samples_leaf": _int(1, 30, log=True),
    "min_samples_split": _int(2, 30, log=True),
    "bootstrap": _choice(True, False),
}
_KNN = {
    "n_neighbors": _int(1, 100, log=True),
    "weights": _choice("uniform", "distance"),
    "p": _choice(1, 2),
}
_MLP = {
    "n_layers": _choice(1, 2),
    "width_1": _int(16, 256, log=True),
    "width_2": _int(16, 256, log=True, when={"n_layers": [2]}),
    "activation": _choice("relu", "tanh"),
    "alpha": _real(1e-6, 1e-1, log=True),
    "learning_rate_init": _real(1e-4, 1e-1, log=True),
}
_MLP_MAX_ITER = 300
_SVM_MAX_ITER = 1_000_000  # bounds a libsvm run that would not converge


def _svc(c: dict, seed: int, n_train: int | None, proba: bool):
    from sklearn.svm import SVC

    est = SVC(C=c["C"], gamma=c["gamma"], kernel="rbf", max_iter=_SVM_MAX_ITER, random_state=seed)
    if proba:  # scikit-learn's advice since SVC(probability=True) is deprecated
        from sklearn.calibration import CalibratedClassifierCV

        return CalibratedClassifierCV(est, ensemble=False, cv=3)
    return est


def _svr(c: dict, seed: int, n_train: int | None, proba: bool):
    from sklearn.svm import SVR

    return SVR(C=c["C"], gamma=c["gamma"], epsilon=c["epsilon"], kernel="rbf", max_iter=_SVM_MAX_ITER)


def _gbt(cls_name: str):
    def build(c: dict, seed: int, n_train: int | None, proba: bool):
        from sklearn import ensemble

        return getattr(ensemble, cls_name)(**c, random_state=seed)

    return build


def _forest(cls_name: str):
    def build(c: dict, seed: int, n_train: int | None, proba: bool):
        from sklearn import ensemble

        return getattr(ensemble, cls_name)(**c, n_jobs=1, random_state=seed)

    return build


def _knn(cls_name: str):
    def build(c: dict, seed: int, n_train: int | None, proba: bool):
        from sklearn import neighbors

        k = c["n_neighbors"] if n_train is None else max(1, min(c["n_neighbors"], n_train))
        return getattr(neighbors, cls_name)(n_neighbors=k, weights=c["weights"], p=c["p"])

    return build


def _mlp(cls_name: str):
    def build(c: dict, seed: int, n_train: int | None, proba: bool):
        from sklearn import neural_network

        layers = (c["width_1"],) if c["n_layers"] == 1 else (c["width_1"], c["width_2"])
        return getattr(neural_network, cls_name)(
            hidden_layer_sizes=layers,
            activation=c["activation"],
            alpha=c["alpha"],
            learning_rate_init=c["learning_rate_init"],
            max_iter=_MLP_MAX_ITER,
            random_state=seed,
        )

    return build


def _logreg(c: dict, seed: int, n_train: int | None, proba: bool):
    from sklearn.linear_model import LogisticRegression

    weight = None if c["class_weight"] == "none" else c["class_weight"]
    return LogisticRegression(C=c["C"], class_weight=weight, max_iter=1000)


def _ridge(c: dict, seed: int, n_train: int | None, proba: bool):
    from sklearn.linear_model import Ridge

    return Ridge(alpha=c["alpha"])


@dataclass(frozen=True)
class Learner:
    """A built-in learner for one kind of task.

    Attributes
    ----------
    key : str
        Learner key (``svm``, ``gbt``, ...).
    kind : {"classification", "regression"}
        Kind of task.
    estimator : str
        The scikit-learn estimator it wraps.
    space : Space
        Default search space (ranges are common practice).
    defaults : dict
        Value of every tunable parameter when a space leaves it out
        (scikit-learn's own defaults).
    build : callable
        ``build(values, seed, n_train, proba) -> estimator`` with ``values``
        holding every parameter of ``defaults`` (without the preprocessing;
        use :func:`build_estimator`).
    """

    key: str
    kind: str
    estimator: str
    space: Space = field(repr=False)
    defaults: dict = field(repr=False)
    build: Callable = field(repr=False)


def _learner(key: str, kind: str, estimator: str, params: dict, defaults: dict, build: Callable) -> Learner:
    space = Space.from_dict({"params": params, "learner": key}, where=f"default space of {key!r}")
    assert set(space.names) <= set(defaults), key
    return Learner(key, kind, estimator, space, defaults, build)


C, R = "classification", "regression"
_SVM_DEFAULTS = {"C": 1.0, "gamma": "scale"}
_GBT_DEFAULTS = {"learning_rate": 0.1, "max_iter": 100, "max_leaf_nodes": 31, "min_samples_leaf": 20,
                 "l2_regularization": 0.0, "max_features": 1.0}
_FOREST_DEFAULTS = {"n_estimators": 100, "min_samples_leaf": 1, "min_samples_split": 2, "bootstrap": True}
_KNN_DEFAULTS = {"n_neighbors": 5, "weights": "uniform", "p": 2}
_MLP_DEFAULTS = {"n_layers": 1, "width_1": 100, "width_2": 100, "activation": "relu", "alpha": 1e-4,
                 "learning_rate_init": 1e-3}
LEARNERS: dict[str, dict[str, Learner]] = {
    "svm": {
        C: _learner("svm", C, "SVC", {"C": _SVM_C, "gamma": _SVM_GAMMA}, _SVM_DEFAULTS, _svc),
        R: _learner(
            "svm", R, "SVR", {"C": _SVM_C, "gamma": _SVM_GAMMA, "epsilon": _real(1e-3, 1.0, log=True)},
            {**_SVM_DEFAULTS, "epsilon": 0.1}, _svr,
        ),
    },
    "gbt": {
        C: _learner("gbt", C, "HistGradientBoostingClassifier", _GBT, _GBT_DEFAULTS,
                    _gbt("HistGradientBoostingClassifier")),
        R: _learner("gbt", R, "HistGradientBoostingRegressor", _GBT, _GBT_DEFAULTS,
                    _gbt("HistGradientBoostingRegressor")),
    },
    "logreg": {
        C: _learner(
            "logreg", C, "LogisticRegression",
            {"C": _real(1e-4, 1e4, log=True), "class_weight": _choice("none", "balanced")},
            {"C": 1.0, "class_weight": "none"}, _logreg,
        ),
    },
    "ridge": {R: _learner("ridge", R, "Ridge", {"alpha": _real(1e-4, 1e4, log=True)}, {"alpha": 1.0}, _ridge)},
    "forest": {
        C: _learner("forest", C, "RandomForestClassifier", _FOREST, {**_FOREST_DEFAULTS, "max_features": "sqrt"},
                    _forest("RandomForestClassifier")),
        R: _learner("forest", R, "RandomForestRegressor", _FOREST, {**_FOREST_DEFAULTS, "max_features": 1.0},
                    _forest("RandomForestRegressor")),
    },
    "knn": {
        C: _learner("knn", C, "KNeighborsClassifier", _KNN, _KNN_DEFAULTS, _knn("KNeighborsClassifier")),
        R: _learner("knn", R, "KNeighborsRegressor", _KNN, _KNN_DEFAULTS, _knn("KNeighborsRegressor")),
    },
    "mlp": {
        C: _learner("mlp", C, "MLPClassifier", _MLP, _MLP_DEFAULTS, _mlp("MLPClassifier")),
        R: _learner("mlp", R, "MLPRegressor", _MLP, _MLP_DEFAULTS, _mlp("MLPRegressor")),
    },
}
_COUNTERPART = {("logreg", R): "ridge", ("ridge", C): "logreg"}


def _check_kind(kind: Any) -> str:
    if kind not in TASK_KINDS:
        raise ObjectiveError(f"task kind {kind!r} is not known; use one of {', '.join(TASK_KINDS)}")
    return kind


def get_learner(key: str, kind: str) -> Learner:
    """The built-in learner ``key`` for tasks of ``kind``.

    Raises
    ------
    ObjectiveError
        For an unknown key (the message lists the keys) or a learner that
        does not fit the kind of task (the message names the one that does).
    """
    kind = _check_kind(kind)
    if key not in LEARNERS:
        keys = ", ".join(sorted(LEARNERS))
        raise ObjectiveError(f"unknown learner {key!r}; built-in learners are: {keys}")
    by_kind = LEARNERS[key]
    if kind not in by_kind:
        other = _COUNTERPART.get((key, kind))
        hint = f"; use {other!r} for {kind}" if other else ""
        raise ObjectiveError(f"learner {key!r} is for {', '.join(by_kind)} tasks, not {kind}{hint}")
    return by_kind[kind]


def default_space(key: str, kind: str) -> Space:
    """Default search space of a built-in learner (ranges are common practice)."""
    return get_learner(key, kind).space


def default_metric(kind: str) -> str:
    """``accuracy`` for classification, ``r2`` for regression."""
    return _DEFAULT_METRIC[_check_kind(kind)]


def prepare_features(frame: pd.DataFrame) -> pd.DataFrame:
    """Put feature columns into the dtypes the pipeline expects.

    Numbers stay numbers, booleans become 0/1 floats, datetimes become
    seconds since the epoch; everything else is categorical and becomes
    strings (``object`` dtype, missing as NaN).
    """
    out = {}
    for name in frame.columns:
        col = frame[name]
        if ptypes.is_bool_dtype(col):
            out[name] = col.astype(float)
        elif ptypes.is_datetime64_any_dtype(col):
            epoch = pd.Timestamp(0, tz=col.dt.tz)  # any time unit, any time zone
            out[name] = (col - epoch) / pd.Timedelta(seconds=1)
        elif ptypes.is_numeric_dtype(col):
            out[name] = col.astype(float)
        else:
            values = col.astype(object)
            out[name] = values.astype(str).astype(object).where(values.notna(), np.nan)
    return pd.DataFrame(out, index=frame.index).rename(columns=str)


def _preprocessor():
    from sklearn.compose import ColumnTransformer, make_column_selector
    from sklearn.impute import SimpleImputer
    from sklearn.pipeline import Pipeline
    from sklearn.preprocessing import OneHotEncoder, StandardScaler

    numeric = Pipeline([
        ("impute", SimpleImputer(strategy="median", add_indicator=True, keep_empty_features=True)),
        ("scale", StandardScaler()),
    ])
    categorical = Pipeline([
        ("impute", SimpleImputer(strategy="constant", fill_value="(missing)")),
        ("onehot", OneHotEncoder(
            handle_unknown="ignore",
            min_frequency=ONEHOT_MIN_FREQUENCY,
            max_categories=ONEHOT_MAX_CATEGORIES,
            sparse_output=False,
        )),
    ])
    return ColumnTransformer([
        ("numeric", numeric, make_column_selector(dtype_include="number")),
        ("categorical", categorical, make_column_selector(dtype_exclude="number")),
    ])


def build_estimator(
    key: str, kind: str, config: Mapping, seed: int = 0, n_train: int | None = None, proba: bool = False
):
    """The full pipeline (preprocessing + learner) for one config.

    Parameters
    ----------
    key, kind : str
        Learner key and kind of task.
    config : mapping
        Values of some or all of the learner's tunable parameters; the rest
        take :attr:`Learner.defaults`.
    seed : int, default 0
        Seed of every random part of the estimator.
    n_train : int, optional
        Training rows (``knn`` caps ``n_neighbors`` at it).
    proba : bool, default False
        Wrap estimators without ``predict_proba`` so they have one.
    """
    from sklearn.compose import TransformedTargetRegressor
    from sklearn.pipeline import Pipeline
    from sklearn.preprocessing import StandardScaler

    learner = get_learner(key, kind)
    check_parameters(learner, config)
    values = {**learner.defaults, **config}
    model = Pipeline([("prepare", _preprocessor()), ("model", learner.build(values, seed, n_train, proba))])
    if kind == "regression":
        return TransformedTargetRegressor(regressor=model, transformer=StandardScaler())
    return model


def check_parameters(learner: Learner, names: Any) -> None:
    """Raise ObjectiveError unless every name is a tunable parameter of ``learner``."""
    unknown = [n for n in names if n not in learner.defaults]
    if unknown:
        raise ObjectiveError(
            f"learner {learner.key!r} ({learner.estimator}) has no tunable parameter(s) {unknown}; "
            f"its parameters are: {', '.join(learner.defaults)}"
        )


def _check_metric(metric: str | None, kind: str) -> str:
    if metric is None:
        return default_metric(kind)
    metric_direction(metric)  # unknown metric -> error listing them
    if METRICS[metric].kind != kind:
        fitting = ", ".join(m for m, spec in METRICS.items() if spec.kind == kind)
        raise ObjectiveError(f"metric {metric!r} is for {METRICS[metric].kind} tasks; for {kind} use one of: {fitting}")
    return metric


class CVObjective:
    """Cross-validated score of a built-in learner on a table (picklable).

    Build it with :func:`cv_objective`; call it with a config to get a
    :class:`~warmstart.evaluate.objective.TrialResult`. Every config is scored on the
    same folds (fixed at construction), as the mean of the per-fold scores,
    in the metric's natural units (``rmse`` is a positive error; see
    :func:`metric_direction`).

    With a time limit, each trial runs in a child process (see
    :mod:`warmstart.evaluate.deadline`) that is stopped when the limit passes, even in
    the middle of a fit; the trial is then failed with an error naming the
    limit and the fold it was stopped in, and the scores of folds already
    finished are not used. The child receives the objective once and serves
    the following trials; a stopped one is replaced at the next trial.
    :meth:`close` stops it. Without a time limit trials run in this process.
    Warnings (convergence and others) are silenced inside a trial.

    The rows, labels and features are the table as
    :func:`warmstart.data.clean.clean_table` gives it, the same table a
    profile uses: identifier columns left out, dates written as text as days
    since 1970-01-01, rows without a target left out, text labels that
    differ only in case or surrounding spaces merged, infinite feature values
    missing. ``feature_notes`` says what was done per column left out or
    converted, ``data_notes`` what else was done (rows, labels, values).
    """

    def __init__(self, frame, target, learner, metric=None, kind=None, cv=5, seed=0,
                 time_limit=None, space=None, threads=1, keep_columns=()):
        if not isinstance(frame, pd.DataFrame):
            raise ObjectiveError(f"the data must be a pandas DataFrame, got {type(frame).__name__}")
        if target not in frame.columns:
            raise ObjectiveError(f"target column {target!r} not found; columns are: {', '.join(map(str, frame.columns))}")
        original = [c for c in frame.columns if c != target]
        try:  # the same rows, labels and columns as its profile
            cleaned = clean_table(frame, target, keep_columns=keep_columns)
        except TableError as exc:
            raise ObjectiveError(str(exc)) from None
        frame, self.feature_notes, self.data_notes = cleaned.frame, cleaned.column_notes, cleaned.notes
        if original and frame.shape[1] == 1:
            raise ObjectiveError(
                "every feature column was left out: "
                + "; ".join(f"{c!r} {why}" for c, why in self.feature_notes.items())
                + "; pass the ones that are features with keep_columns (--keep-column on the command line)"
            )
        y = frame[target]
        self.kind = _check_kind(kind) if kind is not None else detect_kind(y)
        self.key = learner
        spec = get_learner(learner, self.kind)
        self.metric = _check_metric(metric, self.kind)
        self.maximize = metric_direction(self.metric)
        self.space = space if space is not None else spec.space
        check_parameters(spec, self.space.names)
        self.X = prepare_features(frame.drop(columns=[target]))
        if self.X.shape[1] == 0:
            raise ObjectiveError(f"the data has no feature columns besides the target {target!r}")
        n = len(frame)
        if isinstance(cv, bool) or not isinstance(cv, (int, np.integer)) or not 2 <= cv <= n:
            raise ObjectiveError(f"cv must be a whole number of folds between 2 and the {n} rows, got {cv!r}")
        from sklearn.model_selection import KFold, StratifiedKFold

        if self.kind == "classification":
            self.y = y.astype(str).to_numpy(dtype=object) if not ptypes.is_numeric_dtype(y) else y.to_numpy()
            if ptypes.is_float_dtype(y) and not np.all(np.mod(self.y, 1) == 0):
                raise ObjectiveError(
                    f"target {target!r} holds non-integer numbers ({y.nunique()} distinct values), which are not "
                    "class labels; tune it as a regression task (leave out --kind classification)"
                )
            classes, counts = np.unique(self.y, return_counts=True)
            if len(classes) < 2:
                raise ObjectiveError(
                    f"target {target!r} has a single class ({plain_value(classes[0])!r}); a classifier needs two or more")
            if counts.max() < cv:
                raise ObjectiveError(
                    f"target {target!r} has {len(classes)} classes in {n} rows and none has {cv} rows, so "
                    f"{cv}-fold cross-validation cannot keep a class in every fold; is it an identifier? "
                    "Pick a target with repeated labels (or a regression target)"
                )
            if counts.min() < 2:
                rare = [plain_value(c) for c in classes[counts < 2][:5]]
                raise ObjectiveError(
                    f"target {target!r}: class(es) {rare} have a single row, which cross-validation cannot both "
                    "train and score on; drop or merge those rows"
                )
            splitter = StratifiedKFold(n_splits=int(cv), shuffle=True, random_state=seed)
        else:
            if not ptypes.is_numeric_dtype(y) or ptypes.is_bool_dtype(y):
                raise ObjectiveError(f"target {target!r} has dtype {y.dtype}; a regression target must be numeric")
            self.y = y.to_numpy(dtype=float)
            classes = ()
            splitter = KFold(n_splits=int(cv), shuffle=True, random_state=seed)
        with warnings.catch_warnings():  # small classes: scikit-learn warns, we go on
            warnings.simplefilter("ignore")
            self.folds = [(tr, te) for tr, te in splitter.split(self.X, self.y)]
        scorer = METRICS[self.metric].scorer
        if self.metric == "roc_auc" and len(classes) > 2:
            scorer = "roc_auc_ovr"
        self.scorer_name, self.sign = scorer, METRICS[self.metric].sign
        self.proba = self.metric == "log_loss" or scorer == "roc_auc_ovr"
        self.seed = seed
        self.time_limit = check_time_limit(time_limit)
        self.threads = threads
        self._runner: StoppableRunner | None = None

    def __call__(self, config: Mapping) -> TrialResult:
        started_at, started = utc_now(), time.perf_counter()
        try:
            config = self.space.normalize(config)
        except Exception as exc:
            return TrialResult.failed(error_text(exc), started, started_at)
        if self.time_limit is not None:
            return self._call_limited(config)
        try:
            scores = self.fold_scores(config)
        except Exception as exc:  # a failed trial; the search goes on
            return TrialResult.failed(error_text(exc), started, started_at)
        cost = time.perf_counter() - started
        return TrialResult(float(np.mean(scores)), "ok", cost, None, started_at, utc_now(), tuple(scores))

    def fold_scores(self, config: dict, report: Callable[[int], None] | None = None) -> list[float]:
        """The per-fold scores of a normalized config, in this process.

        Parameters
        ----------
        config : dict
            A config already normalized by the space (``space.normalize``).
        report : callable, optional
            Called with the fold's index (from 0) before each fold.

        Raises
        ------
        Exception
            Whatever the fit or the scorer raises; ObjectiveError for a
            non-finite fold score.
        """
        scores: list[float] = []
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            with _thread_limit(self.threads):
                for k, (train, test) in enumerate(self.folds):
                    if report is not None:
                        report(k)
                    scores.append(self._fold(config, train, test, k))
        return scores

    def _call_limited(self, config: dict) -> TrialResult:
        """Evaluate in a child process that is stopped when the time limit passes."""
        if self._runner is None:
            # the job is a copy without the runner (same arrays), so no cycle keeps the runner alive
            self._runner = StoppableRunner(copy.copy(self).fold_scores)
        outcome = self._runner.run(config, self.time_limit)
        n_folds = len(self.folds)
        where = ("before its first fold" if outcome.stage is None
                 else f"during fold {outcome.stage + 1} of {n_folds}")
        if outcome.status == "done":
            scores = outcome.value
            cost = time.perf_counter() - outcome.started
            return TrialResult(float(np.mean(scores)), "ok", cost, None, outcome.started_at, utc_now(), tuple(scores))
        if outcome.status == "timeout":
            error = f"trial exceeded its time limit of {self.time_limit:g} s (stopped {where})"
        elif outcome.status == "ended" and outcome.stage is not None:
            error = f"{outcome.error} ({where})"
        else:
            error = outcome.error
        return TrialResult.failed(error, outcome.started, outcome.started_at)

    def close(self) -> None:
        """Stop the child process that evaluates trials under a time limit (if any).

        It also stops when the objective is garbage-collected or the
        interpreter exits; a later call starts a new one.
        """
        if self._runner is not None:
            self._runner.close()
            self._runner = None

    def __getstate__(self) -> dict:
        state = self.__dict__.copy()
        state["_runner"] = None  # processes stay with their owner; a copy starts its own
        return state

    def _fold(self, config: dict, train: np.ndarray, test: np.ndarray, k: int) -> float:
        from sklearn.metrics import get_scorer

        est = build_estimator(self.key, self.kind, config, self.seed, n_train=len(train), proba=self.proba)
        est.fit(self.X.iloc[train], self.y[train])
        value = self.sign * float(get_scorer(self.scorer_name)(est, self.X.iloc[test], self.y[test]))
        if not math.isfinite(value):
            raise ObjectiveError(f"metric {self.metric} is {value} on fold {k + 1}")
        return value

    def __repr__(self) -> str:
        return (f"CVObjective(learner={self.key!r}, kind={self.kind!r}, metric={self.metric!r}, "
                f"folds={len(self.folds)}, rows={len(self.y)})")


class _thread_limit:
    """Limit BLAS/OpenMP threads inside a trial (parallel workers), or do nothing."""

    def __init__(self, threads: int | None):
        self.threads, self._ctl = threads, None

    def __enter__(self):
        if self.threads:
            # load the estimators' native libraries first: threadpoolctl only
            # limits libraries that are already loaded (OpenMP comes with them)
            import sklearn.ensemble  # noqa: F401
            import sklearn.neighbors  # noqa: F401
            import sklearn.svm  # noqa: F401
            from threadpoolctl import threadpool_limits

            self._ctl = threadpool_limits(limits=self.threads)
        return self

    def __exit__(self, *exc):
        if self._ctl is not None:
            self._ctl.restore_original_limits()
        return False


def cv_objective(frame: pd.DataFrame, target: str, learner: str, metric: str | None = None,
                 kind: str | None = None, cv: int = 5, seed: int = 0, time_limit: float | None = None,
                 space: Space | None = None, threads: int | None = 1, keep_columns=()) -> CVObjective:
    """Cross-validated objective of a built-in learner.

    Parameters
    ----------
    frame : DataFrame
        Features and target, used as :func:`warmstart.data.clean.clean_table`
        gives them, as in a profile: rows with a missing target left out,
        text labels that differ only in case or surrounding spaces merged,
        infinite feature values missing, identifier columns left out and
        dates written as text as days.
    target : str
        Target column.
    learner : str
        Learner key (see :data:`LEARNERS`).
    metric : str, optional
        One of :data:`METRICS`; default ``accuracy`` (classification) or
        ``r2`` (regression). ``roc_auc`` is one-vs-rest for more than two
        classes. Scores are natural values: check :func:`metric_direction`.
    kind : {"classification", "regression"}, optional
        Kind of task; guessed from the target by
        :func:`warmstart.profile.detect_kind` if None.
    cv : int, default 5
        Folds (stratified and shuffled for classification, shuffled for
        regression), fixed for every config.
    seed : int, default 0
        Seed of the folds and of the estimators.
    time_limit : float, optional
        Seconds per trial. A trial still running when the limit passes is
        stopped (its child process is terminated) and recorded as failed
        (see :class:`CVObjective`).
    space : Space, optional
        The space configs come from; default the learner's default space.
        Its parameter names must be tunable parameters of the learner.
    threads : int or None, default 1
        Cap on BLAS/OpenMP threads inside a trial. One thread per trial is
        the default: parallelism comes from running trials in parallel
        workers, and OpenMP threads competing for busy cores can slow a
        small fit down tenfold. ``None`` leaves the libraries' own default.
    keep_columns : iterable of str, default ()
        Columns to use as features exactly as they are, even when they look
        like identifiers or dates written as text (see
        :func:`warmstart.data.features.feature_frame`).

    Returns
    -------
    CVObjective
        ``objective(config) -> TrialResult``.

    Examples
    --------
    >>> from sklearn.datasets import load_iris
    >>> frame = load_iris(as_frame=True).frame
    >>> objective = cv_objective(frame, "target", "knn", cv=3)
    >>> result = objective({"n_neighbors": 5, "weights": "uniform", "p": 2})
    >>> result.status, round(result.score, 2) > 0.9
    ('ok', True)
    """
    return CVObjective(frame, target, learner, metric=metric, kind=kind, cv=cv, seed=seed,
                       time_limit=time_limit, space=space, threads=threads, keep_columns=keep_columns)
