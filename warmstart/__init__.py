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

from warmstart.profile import PROFILE_VERSION, detect_kind, profile  # noqa: E402
from warmstart.similarity import ProfileIndex  # noqa: E402

__all__ += ["PROFILE_VERSION", "ProfileIndex", "detect_kind", "profile"]

from warmstart.evaluate.learners import (  # noqa: E402
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
from warmstart.evaluate.objective import CallableObjective, CommandObjective  # noqa: E402
from warmstart.evaluate.result import ObjectiveError, TrialResult  # noqa: E402

__all__ += [
    "LEARNERS", "METRICS", "CVObjective", "Learner", "build_estimator", "cv_objective", "default_metric",
    "default_space", "get_learner", "metric_direction",
    "CallableObjective", "CommandObjective", "ObjectiveError", "TrialResult",
]

from warmstart.starter import StarterError, StarterLoad, load_starter, read_starter  # noqa: E402

__all__ += ["StarterError", "StarterLoad", "load_starter", "read_starter"]

from warmstart.search.baselines import (  # noqa: E402
    GPSearch,
    NelderMeadSearch,
    RandomSearch,
    SobolSearch,
    expected_improvement,
)
from warmstart.search.kde import KDEError, MixedKDE  # noqa: E402
from warmstart.search.density import DensitySearch  # noqa: E402
from warmstart.search.strategy import SearchError, SearchResult, SearchStrategy, Trial, run_search  # noqa: E402
from warmstart.search.testfunctions import (  # noqa: E402
    BenchmarkFunction,
    benchmark_functions,
    branin,
    hartmann6,
    rastrigin,
    rosenbrock,
)

__all__ += [
    "DensitySearch", "GPSearch", "KDEError", "MixedKDE", "NelderMeadSearch", "RandomSearch",
    "SearchError", "SearchResult", "SearchStrategy", "SobolSearch", "Trial", "expected_improvement",
    "run_search", "BenchmarkFunction", "benchmark_functions", "branin", "hartmann6", "rastrigin",
    "rosenbrock",
]

from warmstart.archive.curate import CheckReport, check_archive, dedupe_trials, fix_archive  # noqa: E402
from warmstart.archive.transfer import MergeSummary, export_archive, import_export, merge_archive  # noqa: E402

__all__ += [
    "CheckReport", "check_archive", "dedupe_trials", "fix_archive",
    "MergeSummary", "export_archive", "import_export", "merge_archive",
]

from warmstart.archive import Archive  # noqa: E402
from warmstart.gain.bits import PooledGain, Runs, TaskGain, bits, bits_interval, compare, pool, target_threshold  # noqa: E402
from warmstart.gain.live import LiveResult, live_gain  # noqa: E402
from warmstart.prior import Prior, PriorError, Source, prior_from_sources  # noqa: E402
from warmstart.gain.replay import ReplayObjective, ReplayResult, leave_one_task_out  # noqa: E402
from warmstart.archive.sources import load_sources  # noqa: E402

__all__ += [
    "Archive", "LiveResult", "PooledGain", "Prior", "PriorError", "ReplayObjective", "ReplayResult", "Runs",
    "Source", "TaskGain", "bits", "bits_interval", "compare", "leave_one_task_out", "live_gain",
    "load_sources", "pool", "prior_from_sources", "target_threshold",
]
