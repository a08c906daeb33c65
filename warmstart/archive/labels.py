"""Studies by label: filters (learner, owner, tags, date, task), tags and
owner, and pruning (planned first, then applied in one transaction).

Re-exported by :mod:`warmstart.archive.curate`, the module the commands use.
"""

from __future__ import annotations

import json
import uuid
from dataclasses import dataclass
from datetime import datetime
from typing import Any, Callable, Iterable, Mapping

import pandas as pd

from warmstart.archive.sql import fetch, rows_changed
from warmstart.archive.store import Archive
from warmstart.errors import ArchiveError

__all__ = ["filter_studies", "PrunePlan", "plan_prune", "apply_prune", "PRUNE_STEPS", "label_study"]


def _parse_date(value: Any) -> datetime:
    if isinstance(value, datetime):
        stamp = pd.Timestamp(value)
    else:
        try:
            stamp = pd.Timestamp(datetime.fromisoformat(str(value).strip()))
        except ValueError:
            raise ArchiveError(
                f"date {value!r} is not a date; use ISO 8601, e.g. 2026-01-31 or 2026-01-31T12:00"
            ) from None
    if stamp.tzinfo is not None:
        stamp = stamp.tz_convert("UTC").tz_localize(None)
    return stamp.to_pydatetime()


def filter_studies(
    frame: pd.DataFrame,
    learner: str | None = None,
    owner: str | None = None,
    tags: Mapping[str, str] | None = None,
    before: Any = None,
    task: str | None = None,
) -> pd.DataFrame:
    """Rows of ``Archive.studies()`` that match every filter given.

    Parameters
    ----------
    frame : pandas.DataFrame
        From :meth:`Archive.studies`.
    learner, owner, task : str, optional
        Exact matches.
    tags : mapping, optional
        Every ``key: value`` must be among the study's tags.
    before : str or datetime, optional
        Studies created before this moment (ISO 8601; naive = UTC).
    """
    keep = pd.Series(True, index=frame.index)
    if learner is not None:
        keep &= frame["learner"] == learner
    if owner is not None:
        keep &= frame["owner"] == owner
    if task is not None:
        keep &= frame["task"] == task
    if tags:
        want = {str(k): str(v) for k, v in tags.items()}
        keep &= frame["tags"].map(lambda t: all(t.get(k) == v for k, v in want.items()))
    if before is not None:
        keep &= frame["created_at"] < _parse_date(before)
    return frame[keep.astype(bool)]


@dataclass(frozen=True)
class PrunePlan:
    """What :func:`apply_prune` will remove.

    Attributes
    ----------
    studies : pandas.DataFrame
        The studies touched: study_id, task, learner, owner, tags, created_at,
        trial_count, remove (trials that go), emptied (the study goes too).
    failed_only : bool
        Only failed trials go (studies left with no trials go too).
    """

    studies: pd.DataFrame
    failed_only: bool

    @property
    def trial_count(self) -> int:
        """Trials that go."""
        return int(self.studies["remove"].sum()) if len(self.studies) else 0

    @property
    def n_studies(self) -> int:
        """Studies that go."""
        return int(self.studies["emptied"].sum()) if len(self.studies) else 0


def plan_prune(
    archive: Archive,
    failed: bool = False,
    before: Any = None,
    learner: str | None = None,
    tags: Mapping[str, str] | None = None,
    owner: str | None = None,
) -> PrunePlan:
    """Work out what a prune would remove; change nothing.

    Study filters (``before``, ``learner``, ``tags``, ``owner``) combine with
    AND and select whole studies; with ``failed`` only the failed trials of
    the selected studies (all studies when no study filter is given) go.

    Raises
    ------
    ArchiveError
        When no filter is given, or a date cannot be read.
    """
    if not (failed or before is not None or learner is not None or tags or owner is not None):
        raise ArchiveError(
            "say what to prune: failed trials (--failed), studies created before a date (--before 2026-01-31), "
            "of a learner (--learner), with a tag (--tag KEY=VALUE) or of an owner (--owner)"
        )
    frame = filter_studies(archive.studies(), learner=learner, owner=owner, tags=tags, before=before)
    counts = archive.con.execute(
        "SELECT study_id, count(*) FILTER (WHERE status = 'failed') AS n_failed FROM trials GROUP BY study_id"
    ).df()
    frame = frame.merge(counts, on="study_id", how="left")
    frame["n_failed"] = frame["n_failed"].fillna(0).astype("int64")
    if failed:
        frame = frame[frame["n_failed"] > 0].copy()
        frame["remove"] = frame["n_failed"]
    else:
        frame = frame.copy()
        frame["remove"] = frame["trial_count"].astype("int64")
    frame["emptied"] = frame["remove"] >= frame["trial_count"]
    cols = ["study_id", "task", "learner", "owner", "tags", "created_at", "trial_count", "remove", "emptied"]
    return PrunePlan(frame[cols].reset_index(drop=True), failed_only=bool(failed))


#: the steps of :func:`apply_prune`, in order (names a progress display shows)
PRUNE_STEPS = ("deleting trials", "deleting studies", "deleting leases")


def apply_prune(archive: Archive, plan: PrunePlan,
                progress: Callable[[str], None] | None = None) -> tuple[int, int]:
    """Remove what ``plan`` lists, in one transaction; returns (trials, studies) removed.

    ``progress`` is called with each name of :data:`PRUNE_STEPS` as it starts.
    """
    if plan.studies.empty:
        return 0, 0
    step = progress or (lambda name: None)
    view = f"_prune_{uuid.uuid4().hex}"
    ids = pd.DataFrame({"study_id": plan.studies["study_id"].astype("int64")})
    with archive.transaction() as con:
        con.register(view, ids)
        try:
            status = " AND status = 'failed'" if plan.failed_only else ""
            step(PRUNE_STEPS[0])
            trials = rows_changed(archive.con, f"DELETE FROM trials WHERE study_id IN (SELECT study_id FROM {view}){status}")
            step(PRUNE_STEPS[1])
            studies = rows_changed(archive.con,
                f"DELETE FROM studies WHERE study_id IN (SELECT study_id FROM {view}) "
                "AND study_id NOT IN (SELECT study_id FROM trials)",
            )
            step(PRUNE_STEPS[2])
            # the service's leases go with what they name: every lease of a study removed, and the
            # recorded leases of the failed trials removed (pending leases of a study kept stay)
            con.execute(
                f"DELETE FROM leases WHERE study_id IN (SELECT study_id FROM {view}) AND "
                "(study_id NOT IN (SELECT study_id FROM studies) OR "
                "(state = 'recorded' AND status = 'failed' AND ?))", [plan.failed_only])
        finally:
            con.unregister(view)
    return trials, studies


def label_study(
    archive: Archive,
    study: int,
    tags: Mapping[str, str] | None = None,
    owner: str | None = None,
    remove: Iterable[str] = (),
) -> dict:
    """Set tags and/or the owner of a study (one transaction).

    Parameters
    ----------
    study : int
        Study id.
    tags : mapping, optional
        Tags to set (added to, or replacing the value of, existing keys).
    owner : str, optional
        New owner; ``""`` clears it; None leaves it as it is.
    remove : iterable of str
        Tag keys to remove (an unknown key is an error naming the known ones).

    Returns
    -------
    dict
        ``{"study_id", "owner", "tags"}`` after the change.
    """
    rows = fetch(archive.con, "SELECT tags, owner FROM studies WHERE study_id = ?", [int(study)])
    if not rows:
        raise ArchiveError(f"no study with id {study} in {archive.path}; `warmstart studies` lists them")
    current = json.loads(rows[0][0]) if rows[0][0] else {}
    for key in remove:
        if key not in current:
            raise ArchiveError(f"study {study} has no tag {key!r}; its tags are {sorted(current)}")
        del current[key]
    for key, value in (tags or {}).items():
        if not isinstance(key, str) or not key:
            raise ArchiveError(f"tag keys must be non-empty strings, got {key!r}")
        current[key] = str(value)
    new_owner = rows[0][1] if owner is None else (owner or None)
    with archive.transaction() as con:
        con.execute(
            "UPDATE studies SET tags = ?, owner = ? WHERE study_id = ?",
            [json.dumps(current, sort_keys=True), new_owner, int(study)],
        )
    return {"study_id": int(study), "owner": new_owner, "tags": current}
