"""Typed bodies of the service's requests and answers (pydantic), validated
at the edge: a body that does not fit is refused with a 4xx naming the field
before any work is done.

Names that become identifiers elsewhere (learners, metrics, tag keys) follow
a plain pattern; task names are free text but never control characters or
path steps (``..``); numbers are finite; configs, profiles and trial tables
have size limits.
"""

from __future__ import annotations

import math
from typing import Annotated, Any, Literal

from pydantic import AfterValidator, BaseModel, ConfigDict, Field, StringConstraints

__all__ = [
    "TaskInfo", "NewStudyBody", "ProposeBody", "RecordBody", "NeighborsBody", "DefaultsBody", "PriorBody",
    "TagBody", "IngestBody", "GainBody", "LEARNER_PATTERN", "MAX_PROFILE", "MAX_PARAMS", "MAX_TRIALS",
]

LEARNER_PATTERN = r"^[A-Za-z0-9][A-Za-z0-9_.+-]{0,63}$"
MAX_PROFILE = 200   # meta-features in a profile (a profile has about 40)
MAX_PARAMS = 100    # parameters in a config or a space
MAX_TRIALS = 200_000  # rows in one ingest body
MAX_K = 256         # leases in one proposal
MAX_LEASE_SECONDS = 7 * 24 * 3600


def _plain_text(value: str) -> str:
    if any(ord(c) < 32 or ord(c) == 127 for c in value):
        raise ValueError("must not contain control characters (newlines, tabs, NUL ...)")
    if value != value.strip():
        raise ValueError("must not start or end with spaces")
    return value


def _task_name(value: str) -> str:
    value = _plain_text(value)
    parts = value.replace("\\", "/").split("/")
    if ".." in parts or value.startswith(("/", "\\", "~")):
        raise ValueError("must not be a path (no leading /, \\ or ~, no '..' step); e.g. 'Millbeck store'")
    return value


def _finite(value: float | None) -> float | None:
    if value is not None and not math.isfinite(value):
        raise ValueError("must be a finite number")
    return value


Learner = Annotated[str, StringConstraints(pattern=LEARNER_PATTERN)]
Metric = Annotated[str, StringConstraints(pattern=LEARNER_PATTERN)]
TagKey = Annotated[str, StringConstraints(pattern=r"^[A-Za-z0-9_.-]{1,64}$")]
TagValue = Annotated[str, StringConstraints(max_length=200), AfterValidator(_plain_text)]
TaskName = Annotated[str, StringConstraints(min_length=1, max_length=200), AfterValidator(_task_name)]
Owner = Annotated[str, StringConstraints(min_length=1, max_length=100), AfterValidator(_plain_text)]
Finite = Annotated[float, AfterValidator(_finite)]
Profile = Annotated[dict[Annotated[str, StringConstraints(min_length=1, max_length=64)], Finite],
                    Field(min_length=1, max_length=MAX_PROFILE)]
Config = Annotated[dict[Annotated[str, StringConstraints(min_length=1, max_length=100)], Any],
                   Field(max_length=MAX_PARAMS)]
Tags = Annotated[dict[TagKey, TagValue], Field(max_length=50)]
Hex64 = Annotated[str, StringConstraints(pattern=r"^[0-9a-f]{64}$")]


class _Body(BaseModel):
    model_config = ConfigDict(extra="forbid", strict=True)


class TaskInfo(_Body):
    """A task as the client describes it: its data stays on the client."""

    name: TaskName
    fingerprint: Hex64 = Field(description="SHA-256 of the data and target (warmstart.archive.fingerprint)")
    kind: Literal["classification", "regression"]
    target: Annotated[str, StringConstraints(min_length=1, max_length=200)]
    n_rows: int | None = Field(default=None, ge=0)
    n_features: int | None = Field(default=None, ge=0)
    profile: Profile
    profile_version: Annotated[str, StringConstraints(min_length=1, max_length=16)]
    source: Annotated[str, StringConstraints(max_length=500)] | None = None


class NewStudyBody(_Body):
    """Create a study; warm from the archive's related studies unless ``cold``."""

    task: TaskInfo
    learner: Learner
    space: dict | None = Field(default=None, description="{'params': {...}}; built-in learners have a default")
    metric: Metric = "score"
    maximize: bool | None = None
    cold: bool = False
    n_seeds: int | None = Field(default=None, ge=0, le=10,
                                description="a ranked list of N past configs first instead of the mixture of past tasks")
    owner: Owner | None = Field(default=None, description="without tokens only; with tokens the token's name")
    tags: Tags = Field(default_factory=dict)


class ProposeBody(_Body):
    k: int = Field(default=1, ge=1, le=MAX_K)
    lease_seconds: float | None = Field(default=None, gt=0, le=MAX_LEASE_SECONDS)


class RecordBody(_Body):
    """A result: by ``trial`` (a lease's id) or by ``config`` (never proposed)."""

    trial: int | None = Field(default=None, ge=1)
    config: Config | None = None
    score: Finite | None = None
    status: Literal["ok", "failed"] = "ok"
    error: Annotated[str, StringConstraints(max_length=2000)] | None = None
    cost_s: Annotated[float, Field(ge=0), AfterValidator(_finite)] | None = None


class NeighborsBody(_Body):
    profile: Profile
    learner: Learner | None = None
    k: int = Field(default=5, ge=1, le=1000)


class DefaultsBody(_Body):
    learner: Learner
    near: Profile | None = None
    n: int = Field(default=10, ge=1, le=1000)
    kind: Literal["classification", "regression"] | None = None


class PriorBody(_Body):
    profile: Profile
    learner: Learner
    space: dict | None = None
    kind: Literal["classification", "regression"] | None = None
    exclude_fingerprint: Hex64 | None = None
    n_seeds: int = Field(default=10, ge=0, le=100)


class TagBody(_Body):
    set: Tags = Field(default_factory=dict)
    remove: Annotated[list[TagKey], Field(max_length=50)] = Field(default_factory=list)
    owner: Annotated[str, StringConstraints(max_length=100), AfterValidator(_plain_text)] | None = None


class IngestBody(_Body):
    """Past trials of one study: one row per trial, a key per parameter plus
    ``score`` (optional ``status``, ``cost_s``, ``started_at``, ``finished_at``, ``error``)."""

    task: TaskInfo
    learner: Learner
    space: dict | None = None
    metric: Metric = "score"
    maximize: bool | None = None
    owner: Owner | None = None
    tags: Tags = Field(default_factory=dict)
    trials: Annotated[list[dict[str, Any]], Field(min_length=1, max_length=MAX_TRIALS)]


class GainBody(_Body):
    learner: Learner
    budget: int = Field(default=10, ge=1, le=200)
    repeats: int = Field(default=30, ge=1, le=1000)
    gamma: float = Field(default=0.05, gt=0, lt=1)
    seed: int = 0
    replay: Literal["nearest", "surrogate"] = "nearest"
    tasks: Annotated[list[TaskName], Field(max_length=1000)] | None = None
