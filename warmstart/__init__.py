"""warmstart: keep a team's tuning history, seed new searches from similar
past tasks, and measure in bits whether the transfer helped.

The names in ``__all__`` are the public API; everything else may change.
They are imported on first use (PEP 562), so ``import warmstart`` and
everyday commands stay quick: a name's module, and what it needs, loads
only when the name is touched.

Examples
--------
>>> import warmstart
>>> space = warmstart.Space.from_dict({"params": {"C": {"type": "real", "low": 0.01, "high": 100, "log": True}}})
>>> search = warmstart.DensitySearch(space, prior=None, seed=0, maximize=True)
>>> config = search.propose()
>>> 0.01 <= config["C"] <= 100
True
"""

from __future__ import annotations

import importlib
import sys
import types
from typing import Any

from warmstart._version import __version__

#: public name -> module that defines it
_WHERE = {
    # errors
    "WarmstartError": "warmstart.errors",
    "ArchiveError": "warmstart.errors",
    "ArchiveLockedError": "warmstart.errors",
    "IngestError": "warmstart.errors",
    "ProfileError": "warmstart.errors",
    "SpaceError": "warmstart.errors",
    "PriorError": "warmstart.prior",
    "SearchError": "warmstart.search.strategy",
    # spaces and profiles
    "Space": "warmstart.space",
    "Param": "warmstart.space",
    "profile": "warmstart.profile",
    "PROFILE_VERSION": "warmstart.profile",
    # the archive and what it gives
    "Archive": "warmstart.archive.store",
    "Prior": "warmstart.prior",
    "load_starter": "warmstart.starter",
    # searches: the one loop and its strategies
    "run_search": "warmstart.search.strategy",
    "Trial": "warmstart.search.strategy",
    "SearchResult": "warmstart.search.strategy",
    "SearchStrategy": "warmstart.search.strategy",
    "DensitySearch": "warmstart.search.density",
    "MixtureSearch": "warmstart.search.mixture",
    "RandomSearch": "warmstart.search.baselines",
    "SobolSearch": "warmstart.search.baselines",
    "GPSearch": "warmstart.search.baselines",
    "NelderMeadSearch": "warmstart.search.baselines",
    # objectives
    "TrialResult": "warmstart.evaluate.result",
    "CallableObjective": "warmstart.evaluate.objective",
    "CommandObjective": "warmstart.evaluate.objective",
    "cv_objective": "warmstart.evaluate.learners",
    "default_space": "warmstart.evaluate.learners",
    # gain in bits
    "bits": "warmstart.gain.bits",
    "compare": "warmstart.gain.bits",
    "pool": "warmstart.gain.bits",
    "leave_one_task_out": "warmstart.gain.replay",
    "ReplayResult": "warmstart.gain.replay",
    "live_gain": "warmstart.gain.live",
    "LiveResult": "warmstart.gain.live",
    # curation
    "check_archive": "warmstart.archive.curate",
    "dedupe_trials": "warmstart.archive.curate",
    "merge_archive": "warmstart.archive.merge",
    "export_archive": "warmstart.archive.exchange",
    "import_export": "warmstart.archive.exchange",
}

__all__ = sorted(_WHERE) + ["__version__"]


def __getattr__(name: str) -> Any:
    module = _WHERE.get(name)
    if module is None:
        raise AttributeError(f"module 'warmstart' has no attribute {name!r}")
    value = getattr(importlib.import_module(module), name)
    globals()[name] = value  # later look-ups skip this function
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))


class _Face(types.ModuleType):
    """The package module: a submodule never hides the public name it shares
    (importing ``warmstart.profile`` would otherwise bind the module over the
    :func:`profile` function)."""

    def __setattr__(self, name: str, value: Any) -> None:
        if name in _WHERE and isinstance(value, types.ModuleType):
            return
        super().__setattr__(name, value)


sys.modules[__name__].__class__ = _Face
