"""The practitioner's real alternative: the library's own default first, then a cold search.

Before tuning, most people try the estimator as it comes. :func:`library_default`
maps scikit-learn's default values of a built-in learner into a space (a value
the space cannot hold is clipped to its bounds, and said so; a default that
depends on the data, such as the SVM's ``gamma="scale"`` or the forest's
``max_features="sqrt"``, is resolved from the task's profile), and
:class:`DefaultFirstSearch` proposes that config first and then runs a cold
:class:`~warmstart.search.density.DensitySearch`, which also learns from the
default's score.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Mapping

import numpy as np

from warmstart.search.density import DensitySearch
from warmstart.search.strategy import SearchError, SearchStrategy, Trial
from warmstart.space import Space

__all__ = ["LibraryDefault", "library_default", "DefaultFirstSearch"]


@dataclass(frozen=True)
class LibraryDefault:
    """A default config mapped into a space.

    Attributes
    ----------
    config : dict
        A valid config of the space.
    clipped : tuple of str
        Parameters whose default lies outside the space (moved to the nearest bound).
    resolved : dict
        Data-dependent defaults and the value they were given (name -> text).
    missing : tuple of str
        Parameters of the space the learner has no default for (drawn from the
        middle of their range: the space's centre).
    """

    config: dict
    clipped: tuple = ()
    resolved: dict = field(default_factory=dict)
    missing: tuple = ()

    def notes(self) -> str:
        """What was changed to fit the default into the space, in words ('' if nothing)."""
        parts = []
        if self.clipped:
            parts.append("clipped into the space: " + ", ".join(self.clipped))
        if self.resolved:
            parts.append("resolved from the profile: " + ", ".join(f"{k} {v}" for k, v in self.resolved.items()))
        if self.missing:
            parts.append("no library default, centre of the range: " + ", ".join(self.missing))
        return "; ".join(parts)


def _n_features(profile: Mapping[str, float] | None) -> float | None:
    if profile is None or "log_features" not in profile:
        return None
    return float(math.exp(profile["log_features"]))


def _resolve(name: str, value: Any, profile: Mapping[str, float] | None) -> tuple[Any, str | None]:
    """A data-dependent default as a number (scikit-learn's rules), and how it was got."""
    n = _n_features(profile)
    if value == "scale":  # SVC/SVR gamma: 1 / (n_features * X.var()); standardised inputs have variance 1
        if n is None:
            raise SearchError(f"the default {name}='scale' needs the task's profile (log_features)")
        return 1.0 / n, f"'scale' = 1 / {n:.0f} features"
    if value == "sqrt":  # forest max_features: sqrt(n_features) features, as a fraction of them
        if n is None:
            raise SearchError(f"the default {name}='sqrt' needs the task's profile (log_features)")
        return math.sqrt(n) / n, f"'sqrt' = sqrt({n:.0f}) of {n:.0f} features"
    return value, None


def library_default(defaults: Mapping[str, Any], space: Space,
                    profile: Mapping[str, float] | None = None) -> LibraryDefault:
    """A learner's default values (scikit-learn's, for a built-in one), as a config of ``space``.

    Parameters
    ----------
    defaults : mapping
        Parameter name -> default value, e.g. ``get_learner("svm", kind).defaults``
        from :mod:`warmstart.evaluate.learners`.
    space : Space
        The space of the search (parameters matched by name).
    profile : mapping, optional
        The task's profile; needed for defaults that depend on the data.

    Returns
    -------
    LibraryDefault
    """
    config: dict = {}
    clipped, missing, resolved = [], [], {}
    centre = space.decode(np.full((1, space.dim), 0.5))[0]
    for p in space.params:
        if p.name not in defaults:
            missing.append(p.name)
            continue
        value, how = _resolve(p.name, defaults[p.name], profile)
        if how:
            resolved[p.name] = how
        if p.kind == "choice":
            if p.level_index(value) < 0:
                missing.append(p.name)
                continue
            config[p.name] = p.choices[p.level_index(value)]
            continue
        v = float(value)
        if v < p.low or v > p.high:
            clipped.append(p.name)
            v = min(max(v, p.low), p.high)
        config[p.name] = int(round(v)) if p.kind == "integer" else v
    for name in missing:
        if name in centre:
            config[name] = centre[name]
    full = space.complete(config, 0)
    return LibraryDefault(space.normalize(full), tuple(clipped), resolved, tuple(missing))


class DefaultFirstSearch(SearchStrategy):
    """A given default config first, then a cold density search.

    Parameters
    ----------
    space : Space
    default : mapping
        The config to try first (e.g. ``library_default(...).config``, or
        one a user gives for an objective of their own).
    seed : int, default 0
    maximize : bool, default True
    """

    def __init__(self, space: Space, default: Mapping, seed: Any = 0, maximize: bool = True):
        super().__init__(space, seed=seed, maximize=maximize)
        self.default = space.normalize(default)
        self._cold = DensitySearch(space, prior=None, seed=seed, maximize=maximize)
        self._default_given = False

    def _propose_one(self) -> tuple[dict, str]:
        if not self._default_given and self.trial_count == 0:
            self._default_given = True
            return dict(self.default), "default"
        return self._cold.propose(), "model"

    def record(self, config: Mapping, score: Any = None, status: str | None = None) -> Trial:
        trial = super().record(config, score, status)
        self._cold.record(trial.config, trial.score, trial.status)
        return trial
