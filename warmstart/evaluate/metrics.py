"""The built-in metrics as plain facts: name, the kind of task, direction,
the scikit-learn scorer that computes it and the range of valid scores.

Nothing here imports scikit-learn or any model: storage (the archive checks
directions and score ranges) and the learners read the same table.
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np

from warmstart.errors import ObjectiveError

__all__ = ["MetricSpec", "METRICS", "SCORE_BOUNDS", "metric_direction", "metric_bounds"]


class MetricSpec(NamedTuple):
    """One built-in metric.

    Attributes
    ----------
    kind : str
        ``"classification"`` or ``"regression"``.
    maximize : bool
        True when larger values are better.
    scorer : str
        scikit-learn's scorer name (``sklearn.metrics.get_scorer``).
    sign : float
        Turns the scorer's value into the metric's natural value (-1 for
        scikit-learn's negated errors and losses).
    """

    kind: str
    maximize: bool
    scorer: str
    sign: float


#: metric -> its facts. Scorer names: scikit-learn's documentation (User Guide,
#: "The scoring parameter"); losses and errors are negated there, so sign -1.
METRICS: dict[str, MetricSpec] = {
    "accuracy": MetricSpec("classification", True, "accuracy", 1.0),
    "balanced_accuracy": MetricSpec("classification", True, "balanced_accuracy", 1.0),
    "roc_auc": MetricSpec("classification", True, "roc_auc", 1.0),  # roc_auc_ovr for > 2 classes
    "log_loss": MetricSpec("classification", False, "neg_log_loss", -1.0),
    "f1_macro": MetricSpec("classification", True, "f1_macro", 1.0),
    "r2": MetricSpec("regression", True, "r2", 1.0),
    "rmse": MetricSpec("regression", False, "neg_root_mean_squared_error", -1.0),
    "mae": MetricSpec("regression", False, "neg_mean_absolute_error", -1.0),
}

#: Range of values each built-in metric can take, as (low, high); None =
#: unbounded on that side. Source: the metric definitions in scikit-learn's
#: documentation (User Guide, "Metrics and scoring"): accuracy, balanced
#: accuracy, ROC AUC and F1 are shares in [0, 1]; R² is at most 1 (arbitrarily
#: negative for a bad model); log loss, RMSE and MAE are non-negative. Scores
#: are stored in natural units (an error is positive), as
#: :class:`warmstart.evaluate.learners.CVObjective` reports them.
SCORE_BOUNDS: dict[str, tuple[float | None, float | None]] = {
    "accuracy": (0.0, 1.0),
    "balanced_accuracy": (0.0, 1.0),
    "roc_auc": (0.0, 1.0),
    "f1_macro": (0.0, 1.0),
    "r2": (None, 1.0),
    "log_loss": (0.0, None),
    "rmse": (0.0, None),
    "mae": (0.0, None),
}


def metric_direction(metric: str) -> bool:
    """True when larger values of ``metric`` are better (False for losses and errors).

    Raises
    ------
    ObjectiveError
        ``metric`` is not built in (the message lists the built-in ones).
    """
    if metric not in METRICS:
        raise ObjectiveError(f"unknown metric {metric!r}; metrics are: {', '.join(METRICS)}")
    return METRICS[metric].maximize


def metric_bounds(metric: str | None) -> tuple[float, float] | None:
    """Valid score range of a built-in metric, or None for a custom metric name.

    Parameters
    ----------
    metric : str or None
        Metric name as stored with a study.

    Returns
    -------
    (float, float) or None
        ``(low, high)``, with ``-inf``/``inf`` on an unbounded side (see
        :data:`SCORE_BOUNDS`).
    """
    if metric not in SCORE_BOUNDS:
        return None
    low, high = SCORE_BOUNDS[metric]
    return (-np.inf if low is None else low, np.inf if high is None else high)
