"""Start, resume and run a study: the warm or cold choice, the prior it starts
from, and the archive record of every finished trial.

:func:`start_study` adds a study to the archive with the search it starts
with (warm from the archive's other studies of the learner when it can,
cold otherwise) and stores what a warm start was built from;
:func:`resume_study` rebuilds that search for a study already in the archive
(a warm one from its stored sources, not from today's archive) and feeds it
the recorded trials, so the same study with the same results gives the same
proposals whatever was added to the archive since; :func:`run_study`
evaluates an objective with the study's search and records each trial as it
finishes (its whole :class:`~warmstart.evaluate.result.TrialResult`: score,
cost, error text, fold scores), so an interrupted run keeps what it finished.
"""

from __future__ import annotations

import concurrent.futures as cf
from collections import Counter
from dataclasses import dataclass
from typing import Any, Callable, Mapping

import duckdb
import numpy as np

from warmstart.archive.sources import recorded_sources, source_identities
from warmstart.evaluate.interrupts import deferred_interrupts
from warmstart.evaluate.objective import local_pool, stop_pool
from warmstart.prior import Prior, PriorError, prior_from_sources
from warmstart.search.density import DEFAULT_N_SEEDS, DensitySearch
from warmstart.search.mixture import MixtureSearch
from warmstart.search.strategy import SearchStrategy, Trial, run_search
from warmstart.space import Space

__all__ = ["Study", "StudyRun", "start_study", "resume_study", "run_study", "summary", "warm_or_cold",
           "search_for_profile",
           "warm_start_record", "recorded_prior"]


@dataclass
class Study:
    """A study of the archive with the search that proposes its configs.

    Attributes
    ----------
    archive : Archive
        Where the study and its trials live.
    study_id : int
    search : SearchStrategy
        Its search, fed with the trials recorded so far: a
        :class:`~warmstart.search.mixture.MixtureSearch` for a warm study (a
        :class:`~warmstart.search.density.DensitySearch` with a seed list
        for one started with ``n_seeds`` or by an older warmstart), a
        :class:`~warmstart.search.density.DensitySearch` for a cold one.
    origin : {"cold", "warm"}
        How it started.
    note : str
        One line for people: warm or cold, and why.
    """

    archive: Any
    study_id: int
    search: SearchStrategy
    origin: str
    note: str

    def record(self, trial: Trial) -> int:
        """Write one finished trial of :func:`run_search` to the archive (committed
        at once); returns its trial number in the study."""
        return self.archive.record_trial(
            self.study_id, trial.config, trial.score, status=trial.status, cost_s=trial.cost_s,
            started_at=trial.started_at, finished_at=trial.finished_at, error=trial.error,
            fold_scores=trial.fold_scores or None,
        )


@dataclass(frozen=True)
class StudyRun:
    """What :func:`run_study` did.

    Attributes
    ----------
    study_id : int
    trials : tuple of Trial
        The trials evaluated and recorded in this run, in order.
    interrupted : bool
        True when Ctrl-C stopped the run (the study is then left unfinished).
    """

    study_id: int
    trials: tuple = ()
    interrupted: bool = False

    @property
    def n_failed(self) -> int:
        """Failed trials of this run."""
        return sum(t.status == "failed" for t in self.trials)

    @property
    def failures(self) -> dict[str, int]:
        """Error text of the failed trials -> how many, most frequent first."""
        errors = Counter(t.error or "no error text" for t in self.trials if t.status == "failed")
        return dict(errors.most_common())


def warm_or_cold(
    archive,
    task_id: int,
    learner: str,
    space: Space,
    maximize: bool,
    seed: Any = 0,
    cold: bool = False,
    n_seeds: int | None = None,
) -> tuple[SearchStrategy, str, dict | None, str]:
    """The search a new study of ``learner`` on task ``task_id`` starts with.

    Warm by default: the archive's studies of the same learner on other
    tasks (the task itself is left out) as a mixture re-weighted at every
    result (:class:`~warmstart.search.mixture.MixtureSearch`). Cold when
    ``cold`` is set, when the task has no profile, or when no past study can
    be used.

    Parameters
    ----------
    archive : Archive
    task_id : int
    learner : str
    space : Space
    maximize : bool
    seed : int or numpy Generator, default 0
        Seed of the search.
    cold : bool, default False
        Force a cold start.
    n_seeds : int, optional
        Warm start with a ranked list of this many past configs first (the
        seed-list search, :class:`~warmstart.search.density.DensitySearch`)
        instead of the mixture.

    Returns
    -------
    (search, origin, prior_record, note)
        ``origin`` is ``"warm"`` or ``"cold"``; ``prior_record`` what the
        study stores about its prior (None when cold); ``note`` one line for
        people.
    """
    prof = archive.profile_of(task_id) if task_id in archive.profiles().index else None
    return search_for_profile(archive, prof, [task_id], learner, space, maximize, seed, cold, n_seeds)


def search_for_profile(
    archive,
    prof: Mapping[str, float] | None,
    exclude_tasks: list[int],
    learner: str,
    space: Space,
    maximize: bool,
    seed: Any = 0,
    cold: bool = False,
    n_seeds: int | None = None,
) -> tuple[SearchStrategy, str, dict | None, str]:
    """:func:`warm_or_cold` for a task known by its profile only (the team
    service starts a study's search before the client's task is stored);
    ``exclude_tasks`` are the archive's tasks of the same data."""
    if cold:
        return DensitySearch(space, prior=None, seed=seed, maximize=maximize), "cold", None, "cold start (--cold)"
    if not prof:
        return (DensitySearch(space, prior=None, seed=seed, maximize=maximize), "cold", None,
                "cold start: this task has no profile to compare")
    try:
        # the prior lists exactly n_seeds configs: a search rebuilt by `propose` from recorded trials
        # skips the listed configs already tried, so the list's length is what bounds the seed phase
        prior = archive.build_prior(prof, learner=learner, space=space, exclude_tasks=list(exclude_tasks),
                                    n_seeds=max(DEFAULT_N_SEEDS if n_seeds is None else n_seeds, 1))
    except PriorError as exc:
        return DensitySearch(space, prior=None, seed=seed, maximize=maximize), "cold", None, f"cold start: {exc}"
    heaviest = prior.provenance["neighbors"][:3]
    used = ", ".join(f"{n['task']!r} (study {n['study_id']}, weight {n['weight']:.2f})" for n in heaviest)
    if n_seeds is None:
        # proposals of the mixture are a function of its seed and the history: the study keeps the seed
        seed = int(seed.integers(2**31)) if isinstance(seed, np.random.Generator) else int(seed)
        search = MixtureSearch(space, prior, seed=seed, maximize=maximize)
        note = (f"warm start from {len(prior.sources)} past studies of {learner!r}, re-weighted at every result; "
                f"heaviest to start with: {used}")
        record = warm_start_record(archive, prior, DEFAULT_N_SEEDS)
        record["search"] = {"kind": "mixture", "seed": seed, "options": dict(search.options)}
        return search, "warm", record, note
    note = (f"warm start from {len(prior.sources)} past studies of {learner!r}; heaviest: {used}; "
            f"prior strength n0 = {prior.strength:.1f}; {n_seeds} past config(s) first")
    search = DensitySearch(space, prior=prior, seed=seed, maximize=maximize, n_seeds=n_seeds)
    return search, "warm", warm_start_record(archive, prior, n_seeds), note


def warm_start_record(archive, prior: Prior, n_seeds: int) -> dict:
    """What a warm study stores in its ``prior`` column.

    The prior's provenance for people (which studies, with which weights;
    without the per-centre list, which the sources rebuild) plus ``recipe``
    (:meth:`~warmstart.prior.Prior.recipe`, each source with its study's
    identity from :func:`~warmstart.archive.sources.source_identities`):
    enough to rebuild the prior exactly, a few hundred bytes per source.
    """
    recipe = prior.recipe()
    identities = source_identities(archive, [s["study_id"] for s in recipe["sources"]])
    recipe["sources"] = [{**s, **identities.get(s["study_id"], {})} for s in recipe["sources"]]
    shown = {k: v for k, v in prior.provenance.items() if k != "centres"}
    return {**shown, "n_seeds": int(n_seeds), "recipe": recipe}


def _legacy_recipe(record: Mapping) -> dict:
    """The recipe of a study started by a warmstart that stored only the
    provenance: its sources were every listed study, in study-id order, with
    their first ``trial_count`` successful trials."""
    info = {k: record[k] for k in ("learner", "profile_version", "bandwidth_scale") if k in record}
    n_seeds = int(record.get("n_seeds", DEFAULT_N_SEEDS))
    return {"top_fraction": record.get("top_fraction", 0.2), "n_seeds": max(n_seeds, 1), "info": info,
            "sources": sorted(record.get("neighbors", []), key=lambda n: int(n["study_id"]))}


def recorded_prior(archive, info: Mapping) -> tuple[Prior | None, str]:
    """The prior a warm study started with, rebuilt from what it stored.

    Parameters
    ----------
    archive : Archive
    info : mapping
        The study as :meth:`Archive.study` returns it.

    Returns
    -------
    (prior, note)
        The prior (None when none of its sources is left) and one line for
        people: where the prior came from and anything no longer as recorded.
        A study started by an older warmstart (no ``recipe``) is rebuilt from
        the studies its provenance lists, which is exact unless their trials
        were deleted since; one with no record at all, or whose sources are
        all gone, is rebuilt from today's archive, and the note says so.
    """
    record = info["prior"] or {}
    n_seeds = int(record.get("n_seeds", DEFAULT_N_SEEDS)) if "search" not in record else None
    recipe = record.get("recipe")
    older = recipe is None
    if older:
        recipe = _legacy_recipe(record)
    space = info["space"]
    sources, problems = recorded_sources(archive, space, recipe["sources"]) if recipe["sources"] else ([], [])
    if not sources:
        fresh, _, _, note = warm_or_cold(archive, int(info["task_id"]), info["learner"], space, info["maximize"],
                                         0, cold=False, n_seeds=n_seeds)
        why = "; ".join(problems) or "the study recorded no sources"
        return fresh.prior, f"{note} (rebuilt from today's archive: {why})"
    prior = prior_from_sources(space, sources, top_fraction=recipe["top_fraction"], provenance=recipe["info"],
                               n_seeds=recipe.get("n_seeds", max(n_seeds or DEFAULT_N_SEEDS, 1)))
    note = (f"warm start from the {len(sources)} past studies of {info['learner']!r} it started with "
            f"(prior strength n0 = {prior.strength:.1f})")
    if older:
        note += "; recorded by an older warmstart, rebuilt from the studies it lists"
    if problems:
        note += "; not as recorded: " + "; ".join(problems)
    return prior, note


def start_study(
    archive,
    task_id: int,
    learner: str,
    space: Space,
    metric: str = "score",
    maximize: bool = True,
    seed: int = 0,
    cold: bool = False,
    n_seeds: int | None = None,
    owner: str | None = None,
    tags: Mapping[str, str] | None = None,
) -> Study:
    """Add a study to the archive and open its search (see :func:`warm_or_cold`).

    Parameters
    ----------
    archive : Archive
        Opened for writing.
    task_id : int
        The task (already in the archive, with its profile).
    learner : str
    space : Space
    metric : str, default "score"
    maximize : bool, default True
    seed : int, default 0
        Seed of the search.
    cold : bool, default False
        Force a cold start.
    n_seeds : int, optional
        Warm start with a ranked list of this many past configs first
        instead of the mixture (see :func:`warm_or_cold`).
    owner : str, optional
    tags : mapping, optional

    Returns
    -------
    Study
    """
    search, origin, record, note = warm_or_cold(archive, task_id, learner, space, maximize, seed, cold, n_seeds)
    study_id = archive.add_study(task_id, learner, space, metric=metric, maximize=maximize, origin=origin,
                                 prior=record, owner=owner, tags=tags)
    return Study(archive, int(study_id), search, origin, note)


def resume_study(archive, study_id: int, seed: int = 0) -> Study:
    """A study of the archive with its search rebuilt and fed its recorded trials.

    A warm study's prior comes from what the study stored when it started
    (:func:`recorded_prior`), not from today's archive. The search's generator is seeded with ``(seed, study_id, number of
    trials)``, so the same history gives the same proposals and every new
    result moves on.

    Parameters
    ----------
    archive : Archive
    study_id : int
    seed : int, default 0

    Returns
    -------
    Study
    """
    info = archive.study(study_id)
    trials = archive.trials(study_id)
    rng = np.random.default_rng([seed, study_id, len(trials)])
    prior, note, n_seeds = None, "cold start", DEFAULT_N_SEEDS
    kept = (info["prior"] or {}).get("search") if info["origin"] == "warm" else None
    if info["origin"] == "warm":
        n_seeds = int((info["prior"] or {}).get("n_seeds", DEFAULT_N_SEEDS))
        prior, note = recorded_prior(archive, info)
    if kept and kept.get("kind") == "mixture" and prior is not None:
        # the mixture's proposals follow from its recorded seed and the history alone
        search = MixtureSearch(info["space"], prior, seed=int(kept["seed"]), maximize=info["maximize"],
                               **kept.get("options", {}))
    else:
        search = DensitySearch(info["space"], prior=prior, seed=rng, maximize=info["maximize"], n_seeds=n_seeds)
    for config, score, status in zip(trials["config"], trials["score"], trials["status"]):
        search.record(config, None if status == "failed" else float(score), status)
    return Study(archive, int(study_id), search, info["origin"], note)


def run_study(
    study: Study,
    objective: Callable,
    budget: int,
    n_workers: int = 1,
    executor: cf.Executor | None = None,
    callback: Callable[[Trial], Any] | None = None,
) -> StudyRun:
    """Evaluate ``budget`` configs of a study and record each as it finishes.

    Parameters
    ----------
    study : Study
    objective : callable
        ``objective(config) -> TrialResult`` (or a score).
    budget : int
        Trials to evaluate (0: none; the study stays open).
    n_workers : int, default 1
        Trials evaluated at once; above 1 without ``executor``, in local
        worker processes (:func:`~warmstart.evaluate.objective.local_pool`).
    executor : concurrent.futures.Executor, optional
        Where to evaluate (a Dask client's executor ...); the caller closes it.
    callback : callable, optional
        Called with each :class:`~warmstart.search.strategy.Trial` after it is recorded.

    Returns
    -------
    StudyRun
        Ctrl-C stops the run cleanly (workers and trial processes stopped,
        finished trials kept, the study left unfinished) and is reported as
        ``interrupted``; the study is marked finished otherwise.
    """
    done: list[Trial] = []

    def keep(trial: Trial) -> None:
        with deferred_interrupts():  # a result written is a result counted (Ctrl-C waits for both)
            study.record(trial)
            done.append(trial)
        if callback is not None:
            callback(trial)

    pool, evaluate = None, objective
    if budget and n_workers > 1 and executor is None:
        pool, evaluate = local_pool(n_workers, objective)
        executor = pool
    elif executor is not None and hasattr(executor, "share"):
        executor.share(evaluate)  # a cluster pool: sent to each worker once, kept between trials
    interrupted = False
    try:
        if budget:
            run_search(study.search, evaluate, budget, callback=keep, n_workers=n_workers, executor=executor)
    except (KeyboardInterrupt, RuntimeError, duckdb.Error) as exc:
        # Ctrl-C may land inside a DuckDB query, which then raises its own
        # "interrupted" error instead of KeyboardInterrupt
        if not isinstance(exc, KeyboardInterrupt) and "interrupt" not in str(exc).lower():
            raise
        interrupted = True
        if pool is not None:
            stop_pool(pool)
            pool = None
    finally:
        if pool is not None:
            pool.shutdown(wait=True)
        close = getattr(objective, "close", None)  # the trial process of a time limit (learners.CVObjective)
        if close is not None:
            close()
    if not interrupted:
        study.archive.finish_study(study.study_id)
    return StudyRun(study.study_id, tuple(done), interrupted)


def summary(study: Study, run: StudyRun) -> dict:
    """The outcome of a run as plain data (what ``warmstart tune --json`` prints)."""
    row = study.archive.study(study.study_id)
    best = study.search.best
    return {
        "study_id": study.study_id, "task_id": int(row["task_id"]), "task": row["task"], "learner": row["learner"],
        "metric": row["metric"], "direction": row["direction"], "origin": row["origin"],
        "trial_count": len(run.trials), "n_failed": run.n_failed,
        "best_score": None if best is None else best.score,
        "best_config": None if best is None else best.config, "interrupted": run.interrupted,
        "failures": run.failures,
    }
