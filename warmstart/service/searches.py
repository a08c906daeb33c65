"""The searches the team service keeps for its studies: started and resumed
by :mod:`warmstart.study`, so a study served over HTTP proposes exactly what
the same study would propose from the command line (a warm study from the
sources it recorded when it started, never from today's archive)."""

from __future__ import annotations

from typing import Any

from warmstart.search.strategy import SearchStrategy
from warmstart.space import Space
from warmstart.study import resume_study, search_for_profile

__all__ = ["start_search", "resume_search"]


def start_search(archive, profile: dict | None, exclude_tasks: list[int], learner: str, space: Space,
                 maximize: bool, seed: Any = 0, cold: bool = False,
                 n_seeds: int | None = None) -> tuple[SearchStrategy, str, dict | None, str]:
    """The search a new study starts with (:func:`warmstart.study.search_for_profile`).

    Returns
    -------
    (search, origin, prior_record, note)
    """
    return search_for_profile(archive, profile, exclude_tasks, learner, space, maximize, seed, cold, n_seeds)


def resume_search(archive, study: int, seed: int = 0) -> tuple[dict, SearchStrategy]:
    """A search for ``study`` fed with its recorded trials (pending configs are
    for the caller to :meth:`~warmstart.search.strategy.SearchStrategy.hold`).

    Returns
    -------
    (info, search)
        ``info`` is :meth:`Archive.study` plus ``note``.
    """
    resumed = resume_study(archive, study, seed=seed)
    info = archive.study(study)
    info["note"] = resumed.note
    return info, resumed.search
