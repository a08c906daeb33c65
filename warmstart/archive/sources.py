"""Past studies as the sources of a prior, read from the archive.

The archive side of a prior: :func:`load_sources` reads every usable study of
a learner and aligns its configs onto the new space; :func:`weight_sources`
gives each the similarity of its task (plain data in, plain data out);
:func:`prior_sources` does both for one profile. :func:`recorded_sources`
reads back the sources a warm study recorded when it started
(:meth:`warmstart.prior.Prior.recipe`), whatever was added since. Building the
prior from the sources is :func:`warmstart.prior.prior_from_sources`, which
knows nothing of the archive.
"""

from __future__ import annotations

from typing import Iterable, Mapping

import numpy as np
import pandas as pd

from warmstart.archive.queries import similar_tasks
from warmstart.errors import ArchiveError
from warmstart.prior import PriorError, Source, within_study_quantiles
from warmstart.profile import PROFILE_VERSION
from warmstart.similarity import BANDWIDTH_SCALE
from warmstart.space import Space

__all__ = ["load_sources", "weight_sources", "prior_sources", "source_from_trials", "prior_info",
           "source_identities", "recorded_sources", "MIN_SOURCE_TRIALS"]

#: Fewest successful trials a past study needs to be a source.
MIN_SOURCE_TRIALS = 3


def source_from_trials(row, trials: pd.DataFrame, from_space: Space, space: Space) -> Source:
    """One study's successful trials as a :class:`Source` over ``space``.

    Parameters
    ----------
    row : object
        The study, with attributes ``study_id``, ``task_id``, ``task`` and
        ``direction`` (a row of :meth:`Archive.studies`).
    trials : pandas.DataFrame
        Its successful trials in number order (``number``, ``config``, ``score``).
    from_space, space : Space
        The study's own space and the new one; configs are aligned by
        parameter name and type when they differ.
    """
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
    return Source(
        study_id=int(row.study_id), task_id=int(row.task_id), task=str(row.task), X=space.encode(aligned),
        quantile=within_study_quantiles(trials["score"].to_numpy(), maximize=row.direction == "maximize"),
        numbers=trials["number"].to_numpy(), clipped=np.array(clipped, dtype=bool),
        notes={k: sorted(v) for k, v in notes.items() if v},
    )


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
        out.append(source_from_trials(row, trials, archive.space(int(row.space_id)), space))
    return out


def weight_sources(sources: list[Source], similar: pd.DataFrame, exclude_tasks: Iterable[int] = ()) -> list[Source]:
    """Copies of ``sources`` with the distance and similarity of their task.

    Parameters
    ----------
    sources : list of Source
    similar : pandas.DataFrame
        ``task_id``, ``distance``, ``similarity`` (from
        :func:`warmstart.archive.queries.similar_tasks`).
    exclude_tasks : iterable of int
        Tasks whose sources are left out (the new task itself, a held-out
        task); leaving them out changes no other source's similarity.

    Returns
    -------
    list of Source
        The sources whose task is in ``similar`` and not excluded, in their
        order.
    """
    exclude = {int(t) for t in exclude_tasks}
    by_task = {int(t): (float(d), float(s))
               for t, d, s in zip(similar["task_id"], similar["distance"], similar["similarity"])}
    out = []
    for s in sources:
        if s.task_id in exclude or s.task_id not in by_task:
            continue
        distance, similarity = by_task[s.task_id]
        out.append(Source(**{**s.__dict__, "distance": distance, "similarity": similarity}))
    return out


def prior_sources(
    archive,
    prof: Mapping[str, float],
    learner: str,
    space: Space,
    exclude_tasks: Iterable[int] = (),
    loaded: list[Source] | None = None,
) -> list[Source]:
    """The sources of a prior for a task with profile ``prof``, weighted.

    Parameters
    ----------
    archive : Archive
    prof : mapping
        Profile of the new task.
    learner : str
        Only studies of this learner are sources.
    space : Space
        The new study's space; past configs are aligned onto it.
    exclude_tasks : iterable of int
        Task ids to leave out (the new task itself, a held-out task).
    loaded : list of Source, optional
        Sources already read with :func:`load_sources` for ``space`` (to
        weight them for many profiles without reading the archive again).

    Raises
    ------
    PriorError
        When no study of the learner can be used; the message counts the
        studies left out for each reason.
    """
    exclude_tasks = [int(t) for t in exclude_tasks]
    sources = load_sources(archive, learner, space) if loaded is None else loaded
    try:
        similar = similar_tasks(archive, prof, learner=learner)
    except ArchiveError as exc:
        raise PriorError(f"no usable past study of learner {learner!r}: {exc}") from None
    weighted = weight_sources(sources, similar, exclude_tasks)
    if weighted:
        return weighted
    of_learner = archive.studies()
    of_learner = of_learner[of_learner["learner"] == learner]
    used = {s.study_id for s in sources}
    comparable = set(int(t) for t in similar["task_id"])
    reasons = {
        f"have fewer than {MIN_SOURCE_TRIALS} successful trials (a study needs at least {MIN_SOURCE_TRIALS})":
            int((~of_learner["study_id"].isin(used)).sum()),
        "are of an excluded task": sum(s.task_id in exclude_tasks for s in sources),
        f"are of another kind of task or lack a version-{PROFILE_VERSION} profile":
            sum(s.task_id not in exclude_tasks and s.task_id not in comparable for s in sources),
    }
    why = "; ".join(f"{n} {reason}" for reason, n in reasons.items() if n)
    raise PriorError(f"no usable past study of learner {learner!r}: of its {len(of_learner)} study(ies), {why}")


def prior_info(learner: str) -> dict:
    """What a prior built from the archive records about how (its provenance ``info``)."""
    return {"learner": learner, "profile_version": PROFILE_VERSION, "bandwidth_scale": BANDWIDTH_SCALE}


def source_identities(archive, study_ids: Iterable[int]) -> dict[int, dict]:
    """What identifies each study beyond its id: its task's fingerprint, its
    learner and its creation time (a merge into another archive keeps these
    and renumbers the study)."""
    wanted = {int(i) for i in study_ids}
    studies = archive.studies()
    studies = studies[studies["study_id"].isin(wanted)]
    fingerprints = archive.tasks().set_index("task_id")["fingerprint"]
    return {
        int(r.study_id): {"task_fingerprint": str(fingerprints.get(r.task_id, "")), "learner": str(r.learner),
                          "created_at": pd.Timestamp(r.created_at).isoformat()}
        for r in studies.itertuples(index=False)
    }


def _find_study(studies: pd.DataFrame, fingerprints: pd.Series, entry: Mapping):
    """The study a recorded source names: by id when its identity (if recorded)
    matches, else by identity (after a merge renumbered it); None if gone."""
    def same(row) -> bool:
        return ("task_fingerprint" not in entry
                or (fingerprints.get(row.task_id) == entry["task_fingerprint"]
                    and row.learner == entry.get("learner", row.learner)
                    and pd.Timestamp(row.created_at).isoformat() == entry.get("created_at")))

    by_id = studies[studies["study_id"] == int(entry["study_id"])]
    for row in by_id.itertuples(index=False):
        if same(row):
            return row
    if "task_fingerprint" in entry:
        for row in studies.itertuples(index=False):
            if same(row):
                return row
    return None


def recorded_sources(archive, space: Space, entries: list[Mapping]) -> tuple[list[Source], list[str]]:
    """Read back the sources a warm study recorded (in the recorded order).

    Each entry names a study (``study_id``, and when recorded its identity
    from :func:`source_identities`), how many successful trials it gave
    (``trial_count``: the first ones by trial number), its ``similarity`` and
    ``distance``, and optionally the ``digest`` of what the prior took from
    it. The sources come back with the recorded similarity and distance, so
    the prior built from them equals the one the study started with as long
    as those trials are unchanged.

    Returns
    -------
    (sources, problems)
        ``problems`` says, per source, what is no longer as recorded (study
        gone, fewer trials, different trials); such a source is used as it
        is now, or left out when gone.
    """
    studies = archive.studies()
    fingerprints = archive.tasks().set_index("task_id")["fingerprint"]
    out, problems = [], []
    for entry in entries:
        label = f"study {entry['study_id']} ({entry.get('task', '?')})"
        row = _find_study(studies, fingerprints, entry)
        if row is None:
            problems.append(f"{label} is no longer in the archive")
            continue
        trials = archive.trials(int(row.study_id))
        trials = trials[trials["status"] == "ok"].head(int(entry["trial_count"]))
        if trials.empty:
            problems.append(f"{label} has no successful trial left")
            continue
        source = source_from_trials(row, trials, archive.space(int(row.space_id)), space)
        distance = entry.get("distance")
        source = Source(**{**source.__dict__, "similarity": float(entry["similarity"]),
                           "distance": float("nan") if distance is None else float(distance)})
        if len(trials) < int(entry["trial_count"]):
            problems.append(f"{label} has {len(trials)} of the {entry['trial_count']} successful trials it had")
        elif entry.get("digest") not in (None, source.digest):
            problems.append(f"{label} has other trials than it had")
        out.append(source)
    return out, problems
