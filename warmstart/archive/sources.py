"""Past studies as prior sources: read from the archive, aligned onto a new
space, weighted by profile similarity, and turned into a :class:`Prior`."""

from __future__ import annotations

from typing import Iterable, Mapping

import numpy as np
import pandas as pd

from warmstart.prior import Prior, PriorError, Source, prior_from_sources, within_study_quantiles
from warmstart.similarity import ProfileIndex
from warmstart.space import Space

__all__ = ["load_sources", "weight_sources", "build_prior", "comparable_profiles", "BANDWIDTH_SCALE"]

#: Similarity kernel bandwidth as a share of the median profile distance
#: (our choice: at the median distance a task keeps e^-2 ~ 14 % of the weight
#: of an identical task, so a few clearly closer tasks dominate, while with no
#: clearly closer task the weights stay flat and the prior tends to what is
#: good across all tasks).
BANDWIDTH_SCALE = 0.5


#: Fewest successful trials a past study needs to be a source.
MIN_SOURCE_TRIALS = 3


def load_sources(archive, learner: str, space: Space, min_trials: int = MIN_SOURCE_TRIALS) -> list[Source]:
    """Every study of ``learner`` with at least ``min_trials`` successful trials,
    aligned onto ``space`` (one :class:`Source` each, similarity 1)."""
    studies = archive.studies()
    studies = studies[studies["learner"] == learner]
    if studies.empty:
        known = sorted(archive.studies()["learner"].unique().tolist())
        raise PriorError(f"the archive has no studies of learner {learner!r}; learners with studies: {known}")
    out: list[Source] = []
    for row in studies.itertuples(index=False):
        trials = archive.trials(int(row.study_id))
        trials = trials[trials["status"] == "ok"]
        if len(trials) < min_trials:
            continue
        from_space = archive.space(int(row.space_id))
        same = from_space == space
        aligned, clipped, notes = [], [], {"dropped": set(), "clipped": set(), "missing": set()}
        for cfg in trials["config"]:
            if same:
                aligned.append(cfg)
                clipped.append(False)
                continue
            a = space.align(cfg, from_space)
            aligned.append(a.config)
            clipped.append(bool(a.clipped))
            notes["dropped"].update(a.dropped)
            notes["clipped"].update(a.clipped)
            notes["missing"].update(a.missing)
        X = space.encode(aligned)
        out.append(Source(
            study_id=int(row.study_id), task_id=int(row.task_id), task=str(row.task), X=X,
            quantile=within_study_quantiles(trials["score"].to_numpy(), maximize=row.direction == "maximize"),
            numbers=trials["number"].to_numpy(), clipped=np.array(clipped, dtype=bool),
            notes={k: sorted(v) for k, v in notes.items() if v},
        ))
    return out


def weight_sources(
    sources: list[Source],
    profiles: pd.DataFrame,
    prof: Mapping[str, float],
    exclude_tasks: Iterable[int] = (),
    bandwidth_scale: float = BANDWIDTH_SCALE,
) -> list[Source]:
    """Set each source's similarity from the profile distance of its task to
    ``prof``; sources of excluded tasks (or tasks without a profile) are left out."""
    exclude = set(int(t) for t in exclude_tasks)
    keep = [s for s in sources if s.task_id not in exclude and s.task_id in profiles.index]
    if not keep:
        return []
    task_ids = sorted({s.task_id for s in keep})
    index = ProfileIndex(profiles.loc[task_ids].dropna(axis=1, how="all"))
    d = index.distances(prof)
    finite = d[np.isfinite(d) & (d > 0)]
    h = bandwidth_scale * (float(np.median(finite)) if finite.size else 1.0)
    sim = np.exp(-0.5 * (d / h) ** 2)
    by_task = {int(t): (float(dd), float(ss)) for t, dd, ss in zip(index.task_ids, d, sim)}
    out = []
    for s in keep:
        dist, similarity = by_task[s.task_id]
        out.append(Source(**{**s.__dict__, "distance": dist, "similarity": max(similarity, 1e-12)}))
    return out


def comparable_profiles(archive, prof: Mapping[str, float]) -> pd.DataFrame:
    """The archive's profiles that can be compared with ``prof``: same profile
    version, same kind of task (classification or regression)."""
    from warmstart.profile import PROFILE_VERSION, profile_kind

    profiles = archive.profiles()
    if profiles.empty:
        return profiles
    tasks = archive.tasks()
    same_kind = tasks.loc[tasks["kind"] == profile_kind(dict(prof)), "task_id"]
    keep = profiles.index.isin(same_kind)
    if "profile_version" in profiles.columns:
        keep &= (profiles["profile_version"] == PROFILE_VERSION).to_numpy()
    return profiles[keep]


def build_prior(
    archive,
    prof: Mapping[str, float],
    learner: str,
    space: Space,
    exclude_tasks: Iterable[int] = (),
    top_fraction: float = 0.2,
    bandwidth_scale: float = BANDWIDTH_SCALE,
    n_seeds: int = 10,
    sources: list[Source] | None = None,
) -> Prior:
    """Build a prior for ``learner`` over ``space`` from the archive's studies.

    Parameters
    ----------
    archive : Archive
    prof : mapping
        Profile of the new task (:func:`warmstart.profile`).
    learner : str
        Only studies of this learner are used.
    space : Space
        The new study's space; past configs are aligned onto it.
    exclude_tasks : iterable of int
        Task ids to leave out (e.g. the new task itself, or a held-out task).
    top_fraction : float, default 0.2
        Share of each study's best configs used as kernel centres.
    bandwidth_scale : float, default 0.5
        Similarity kernel bandwidth as a share of the median profile distance.
    n_seeds : int, default 10
        How many configs :attr:`Prior.seeds` lists.
    sources : list of Source, optional
        Pre-loaded sources (from :func:`load_sources`), to build many priors fast.

    Raises
    ------
    PriorError
        When no study of the learner can be used.
    """
    from warmstart.profile import PROFILE_VERSION

    if sources is None:
        sources = load_sources(archive, learner, space)
    profiles = comparable_profiles(archive, prof)
    weighted = weight_sources(sources, profiles, prof, exclude_tasks, bandwidth_scale)
    if not weighted:
        min_trials = MIN_SOURCE_TRIALS  # what load_sources used above
        of_learner = archive.studies()
        of_learner = of_learner[of_learner["learner"] == learner]
        loaded = {s.study_id for s in sources}
        excluded = set(int(t) for t in exclude_tasks)
        reasons = {
            f"have fewer than {min_trials} successful trials (a study needs at least {min_trials})":
                int((~of_learner["study_id"].isin(loaded)).sum()),
            "are of an excluded task": sum(s.task_id in excluded for s in sources),
            f"are of another kind of task or lack a version-{PROFILE_VERSION} profile":
                sum(s.task_id not in excluded and s.task_id not in profiles.index for s in sources),
        }
        why = "; ".join(f"{n} {reason}" for reason, n in reasons.items() if n)
        raise PriorError(
            f"no usable past study of learner {learner!r}: of its {len(of_learner)} study(ies), {why}"
        )
    info = {"learner": learner, "profile_version": PROFILE_VERSION, "bandwidth_scale": bandwidth_scale}
    return prior_from_sources(space, weighted, top_fraction=top_fraction, provenance=info, n_seeds=n_seeds)
