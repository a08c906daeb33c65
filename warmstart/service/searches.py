"""The search behind a study, as the service builds it: warm or cold at the
start of a study, and rebuilt from the archive when a study is first asked for
proposals after a (re)start.

The rules are the command line's (``tune``, ``propose``): warm from the
archive's studies of the same learner on other tasks unless asked cold or
nothing can be learnt; a warm study records its prior's provenance and the
number of seeds, and a rebuilt search takes the same number of seeds.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from warmstart.search.density import DEFAULT_N_SEEDS, DensitySearch
from warmstart.space import Space

__all__ = ["start_search", "resume_search"]


def start_search(archive, profile: dict | None, exclude_tasks: list[int], learner: str, space: Space,
                 maximize: bool, seed: Any = 0, cold: bool = False,
                 n_seeds: int = DEFAULT_N_SEEDS) -> tuple[DensitySearch, str, dict | None, str]:
    """The search a new study starts with.

    ``profile`` is the task's (None: nothing to compare, a cold start);
    ``exclude_tasks`` the archive's tasks of the same data, left out of the prior.

    Returns
    -------
    (search, origin, provenance, note)
        ``origin`` is ``"warm"`` or ``"cold"``; ``provenance`` the prior's
        (with ``n_seeds``) for a warm study; ``note`` says why, in a line.
    """
    from warmstart.prior import PriorError

    def cold_start(why: str):
        return DensitySearch(space, prior=None, seed=seed, maximize=maximize), "cold", None, why

    if cold:
        return cold_start("cold start (asked for)")
    if not profile:
        return cold_start("cold start: this task has no profile to compare")
    try:
        prior = archive.build_prior(profile, learner=learner, space=space,
                                    exclude_tasks=list(exclude_tasks), n_seeds=max(n_seeds, 1))
    except PriorError as exc:
        return cold_start(f"cold start: {exc}")
    heaviest = prior.provenance["neighbors"][:3]
    used = ", ".join(f"{n['task']!r} (study {n['study_id']}, weight {n['weight']:.2f})" for n in heaviest)
    note = (f"warm start from {len(prior.sources)} past studies of {learner!r}; heaviest: {used}; "
            f"prior strength n0 = {prior.strength:.1f}")
    search = DensitySearch(space, prior=prior, seed=seed, maximize=maximize, n_seeds=n_seeds)
    return search, "warm", {**prior.provenance, "n_seeds": n_seeds}, note


def resume_search(archive, study: int, seed: Any = None) -> tuple[dict, DensitySearch]:
    """A search for ``study`` fed with its recorded trials (pending configs are
    for the caller to :meth:`~warmstart.search.strategy.SearchStrategy.hold`).

    Returns
    -------
    (info, search)
        ``info`` is :meth:`Archive.study` plus ``note``.
    """
    info = archive.study(study)
    trials = archive.trials(study)
    rng = np.random.default_rng([study, len(trials)] if seed is None else seed)
    prior, note, n_seeds = None, "cold start", DEFAULT_N_SEEDS
    if info["origin"] == "warm":
        n_seeds = int((info["prior"] or {}).get("n_seeds", DEFAULT_N_SEEDS))
        task_id = int(info["task_id"])
        profile = archive.profile_of(task_id) if task_id in archive.profiles().index else None
        fresh, _, _, note = start_search(archive, profile, [task_id], info["learner"], info["space"],
                                         info["maximize"], 0, cold=False, n_seeds=n_seeds)
        prior = fresh.prior
    info["note"] = note
    search = DensitySearch(info["space"], prior=prior, seed=rng, maximize=info["maximize"], n_seeds=n_seeds)
    for config, score, status in zip(trials["config"], trials["score"], trials["status"]):
        search.record(config, None if status == "failed" else float(score), status)
    return info, search
