"""warmstart: keep a team's tuning history, seed new searches from similar
past tasks, and measure in bits whether the transfer helped.

The names below are the public API; everything else may change.
"""

from warmstart.errors import (
    ArchiveError,
    ArchiveLockedError,
    IngestError,
    ProfileError,
    SpaceError,
    WarmstartError,
)
from warmstart.space import Alignment, Param, Space

__version__ = "0.1.0"

__all__ = [
    "Alignment",
    "ArchiveError",
    "ArchiveLockedError",
    "IngestError",
    "Param",
    "ProfileError",
    "Space",
    "SpaceError",
    "WarmstartError",
    "__version__",
]

# Public names added by later modules are imported below, one block each.

from warmstart.learners import (  # noqa: E402
    LEARNERS,
    METRICS,
    CVObjective,
    Learner,
    build_estimator,
    cv_objective,
    default_metric,
    default_space,
    get_learner,
    metric_direction,
)
from warmstart.objective import (  # noqa: E402
    CallableObjective,
    CommandObjective,
    ObjectiveError,
    TrialFailed,
    TrialResult,
    score_function,
)

__all__ += [
    "LEARNERS", "METRICS", "CVObjective", "Learner", "build_estimator", "cv_objective", "default_metric",
    "default_space", "get_learner", "metric_direction",
    "CallableObjective", "CommandObjective", "ObjectiveError", "TrialFailed", "TrialResult", "score_function",
]
