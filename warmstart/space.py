"""Search spaces: parameter kinds, validation, unit-cube encoding, files.

A :class:`Space` is an ordered set of parameters of three kinds:

``real``
    a float in ``[low, high]``, optionally on a log scale;
``integer``
    an int in ``[low, high]``, optionally on a log scale;
``choice``
    one of a list of levels (str, int, float or bool).

A parameter may be *conditional*: active only when one or more ``choice``
parameters take given levels (``"when": {"kernel": ["poly", "rbf"]}``).
A config holds the active parameters only.

Encoding maps a config to one row of floats: ``real``/``integer`` into
``[0, 1]`` (integers at the centre of their cell, so every integer owns an
equal share of the cube), ``choice`` to its level index, and an inactive
parameter to NaN (marked, never imputed).
"""

from __future__ import annotations

import hashlib
import json
import math
import tomllib
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Iterable, Mapping, Sequence

import numpy as np

from warmstart.errors import SpaceError

__all__ = ["Param", "Space", "Alignment", "KINDS", "unit_distances"]

KINDS = ("real", "integer", "choice")
_PARAM_KEYS = {"type", "low", "high", "log", "choices", "when"}
_SPACE_KEYS = {"params", "learner", "description"}


def _level_key(value: Any) -> tuple[str, Any]:
    """Key that matches a choice level by meaning (1 == 1.0, True != 1)."""
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, bool):
        return ("bool", value)
    if isinstance(value, (int, float)):
        return ("num", float(value))
    if isinstance(value, str):
        return ("str", value)
    raise TypeError(type(value).__name__)


def plain_value(value: Any) -> Any:
    """A numpy scalar as the plain Python value (other values unchanged).

    Used wherever a value is written into a message or JSON."""
    if isinstance(value, np.generic):
        return value.item()
    return value


@dataclass(frozen=True)
class Param:
    """One tunable parameter.

    Parameters
    ----------
    name : str
        Parameter name, any non-empty string.
    kind : {"real", "integer", "choice"}
        Parameter kind.
    low, high : float or int, optional
        Inclusive bounds of ``real`` and ``integer`` parameters.
    log : bool, default False
        Search on a log scale (bounds must be positive).
    choices : tuple, optional
        Levels of a ``choice`` parameter.
    when : tuple of (str, tuple), default ()
        Conditions: pairs of (choice parameter, allowed levels); the
        parameter is active only when every condition holds.
    """

    name: str
    kind: str
    low: float | int | None = None
    high: float | int | None = None
    log: bool = False
    choices: tuple = ()
    when: tuple = ()

    # -- unit cube ---------------------------------------------------------
    @property
    def n_levels(self) -> int:
        """Number of discrete values (0 for ``real``)."""
        if self.kind == "choice":
            return len(self.choices)
        if self.kind == "integer":
            return int(self.high - self.low + 1)
        return 0

    def _log_edges(self) -> tuple[float, float]:
        if self.kind == "integer":
            return math.log(self.low - 0.5), math.log(self.high + 0.5)
        return math.log(self.low), math.log(self.high)

    def to_unit(self, values: np.ndarray) -> np.ndarray:
        """Encode valid numeric values of a ``real``/``integer`` parameter."""
        v = np.asarray(values, dtype=float)
        if self.kind == "real":
            if self.log:
                lo, hi = self._log_edges()
                u = (np.log(v) - lo) / (hi - lo)
            else:
                u = (v - self.low) / (self.high - self.low)
            return np.clip(u, 0.0, 1.0)
        # integers: centre of the cell that the integer owns
        if self.log:
            lo, hi = self._log_edges()
            mid = 0.5 * (np.log(v - 0.5) + np.log(v + 0.5))
            return np.clip((mid - lo) / (hi - lo), 0.0, 1.0)
        return (v - self.low + 0.5) / (self.high - self.low + 1)

    def from_unit(self, u: np.ndarray) -> np.ndarray:
        """Decode unit-cube coordinates into values (floats; ints for integer)."""
        u = np.clip(np.asarray(u, dtype=float), 0.0, 1.0)
        if self.kind == "real":
            if self.log:
                lo, hi = self._log_edges()
                v = np.exp(lo + u * (hi - lo))
            else:
                v = self.low + u * (self.high - self.low)
            return np.clip(v, self.low, self.high)
        if self.log:
            lo, hi = self._log_edges()
            v = np.floor(np.exp(lo + u * (hi - lo)) + 0.5)
        else:
            v = self.low + np.floor(u * (self.high - self.low + 1))
        return np.clip(v, self.low, self.high)

    def level_index(self, value: Any) -> int:
        """Index of a choice level, or -1 when the value is not a level."""
        try:
            key = _level_key(value)
        except TypeError:
            return -1
        for i, level in enumerate(self.choices):
            if _level_key(level) == key:
                return i
        return -1

    def describe(self) -> str:
        """Short human-readable description of what the parameter allows."""
        if self.kind == "choice":
            return "one of " + ", ".join(json.dumps(c) for c in self.choices)
        scale = ", log scale" if self.log else ""
        return f"{self.kind} in [{self.low}, {self.high}]{scale}"

    def to_dict(self) -> dict:
        d: dict[str, Any] = {"type": self.kind}
        if self.kind == "choice":
            d["choices"] = list(self.choices)
        else:
            d["low"] = self.low
            d["high"] = self.high
            if self.log:
                d["log"] = True
        if self.when:
            d["when"] = {parent: list(levels) for parent, levels in self.when}
        return d


@dataclass(frozen=True)
class Alignment:
    """Result of :meth:`Space.align`.

    Attributes
    ----------
    config : dict
        The values that could be carried over; every value is valid and
        active in the target space. Missing parameters are left out.
    clipped : tuple of str
        Parameters whose value lay outside the target bounds and was clipped.
    dropped : tuple of str
        Parameters of the source config the target space cannot take (unknown
        name, incompatible kind, choice level the target lacks, inactive).
    missing : tuple of str
        Active parameters of the target space with no value; the caller fills
        them (for instance uniformly, with :meth:`Space.complete`).
    """

    config: dict
    clipped: tuple = ()
    dropped: tuple = ()
    missing: tuple = ()

    @property
    def exact(self) -> bool:
        """True when nothing was clipped, dropped or missing."""
        return not (self.clipped or self.dropped or self.missing)


def _parse_param(name: str, spec: Any, where: str) -> Param:
    """One parameter of a space's spec: the checks every kind shares, then its kind's own."""
    if not isinstance(name, str) or not name:
        raise SpaceError(f"{where}: parameter names must be non-empty strings, got {name!r}")
    if not isinstance(spec, Mapping):
        raise SpaceError(
            f"{where}: parameter {name!r} must be a table/object with a 'type', got {spec!r}"
        )
    unknown = set(spec) - _PARAM_KEYS
    if unknown:
        raise SpaceError(
            f"{where}: parameter {name!r} has unknown key(s) {sorted(unknown)}; "
            f"allowed keys are {sorted(_PARAM_KEYS)}"
        )
    kind = spec.get("type")
    if kind not in KINDS:
        raise SpaceError(
            f"{where}: parameter {name!r} has type {kind!r}; use one of {', '.join(KINDS)}"
        )
    when = _parse_when(name, spec.get("when"), where)
    log = spec.get("log", False)
    if not isinstance(log, bool):
        raise SpaceError(f"{where}: parameter {name!r} has log={log!r}; use true or false")
    if kind == "choice":
        return _parse_choice(name, spec, log, when, where)
    return _parse_range(name, kind, spec, log, when, where)


def _parse_choice(name: str, spec: Mapping, log: bool, when: tuple, where: str) -> Param:
    """A choice parameter: distinct levels that are strings, finite numbers or booleans."""
    if "low" in spec or "high" in spec or log:
        raise SpaceError(
            f"{where}: choice parameter {name!r} takes 'choices' only, not low/high/log"
        )
    choices = spec.get("choices")
    if not isinstance(choices, (list, tuple)) or len(choices) == 0:
        raise SpaceError(
            f"{where}: choice parameter {name!r} needs a non-empty list 'choices', got {choices!r}"
        )
    keys = []
    for c in choices:
        c = plain_value(c)
        if c is None or not isinstance(c, (str, int, float, bool)) or (
            isinstance(c, float) and not math.isfinite(c)
        ):
            raise SpaceError(
                f"{where}: choice parameter {name!r} has level {c!r}; levels must be "
                "strings, finite numbers or booleans"
            )
        keys.append(_level_key(c))
    if len(set(keys)) != len(keys):
        dup = next(plain_value(c) for c, k in zip(choices, keys) if keys.count(k) > 1)
        raise SpaceError(
            f"{where}: choice parameter {name!r} repeats a level ({dup!r}) in {list(choices)!r}; "
            "levels must be distinct (1 and 1.0 count as the same level, true and 1 do not)"
        )
    return Param(name, "choice", choices=tuple(plain_value(c) for c in choices), when=when)


def _parse_range(name: str, kind: str, spec: Mapping, log: bool, when: tuple, where: str) -> Param:
    """An integer or real parameter: finite bounds in order, positive on a log scale."""
    if "choices" in spec:
        raise SpaceError(f"{where}: {kind} parameter {name!r} takes low/high, not 'choices'")
    low, high = spec.get("low"), spec.get("high")
    for label, value in (("low", low), ("high", high)):
        value = plain_value(value)
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
            raise SpaceError(
                f"{where}: parameter {name!r} needs a finite number for {label!r}, got {value!r}"
            )
        if kind == "integer" and float(value) != int(value):
            raise SpaceError(
                f"{where}: integer parameter {name!r} needs a whole number for {label!r}, got {value!r}"
            )
    if kind == "integer":
        low, high = int(low), int(high)
        if low > high:
            raise SpaceError(
                f"{where}: parameter {name!r} has low={low} > high={high}; swap them"
            )
        if log and low < 1:
            raise SpaceError(
                f"{where}: parameter {name!r} is on a log scale but low={low}; "
                "a log-scale integer needs low >= 1"
            )
    else:
        low, high = float(low), float(high)
        if not low < high:
            raise SpaceError(
                f"{where}: parameter {name!r} has low={low} >= high={high}; "
                "a real parameter needs low < high"
            )
        if log and low <= 0:
            raise SpaceError(
                f"{where}: parameter {name!r} is on a log scale but low={low}; "
                "a log scale needs positive bounds (low > 0)"
            )
    return Param(name, kind, low=low, high=high, log=log, when=when)


def _parse_when(name: str, when: Any, where: str) -> tuple:
    if when is None:
        return ()
    if not isinstance(when, Mapping) or not when:
        raise SpaceError(
            f"{where}: parameter {name!r} has when={when!r}; use a table "
            "{choice_parameter = [levels...]}"
        )
    out = []
    for parent, levels in when.items():
        if not isinstance(levels, (list, tuple)):
            levels = [levels]
        out.append((parent, tuple(plain_value(v) for v in levels)))
    return tuple(sorted(out, key=lambda pair: pair[0]))


class Space:
    """An ordered set of tunable parameters.

    Parameters
    ----------
    params : sequence of Param
        The parameters. Conditions may only refer to ``choice`` parameters
        of the same space, without cycles.
    learner : str, optional
        The learner this space belongs to (informational).

    Examples
    --------
    >>> space = Space.from_dict({"params": {
    ...     "C": {"type": "real", "low": 1e-3, "high": 1e3, "log": True},
    ...     "kernel": {"type": "choice", "choices": ["rbf", "poly"]},
    ...     "degree": {"type": "integer", "low": 2, "high": 5,
    ...                "when": {"kernel": ["poly"]}}}})
    >>> space.validate({"C": 1.0, "kernel": "rbf"})
    >>> space.encode([{"C": 1.0, "kernel": "rbf"}]).round(3).tolist()
    [[0.5, 0.0, nan]]
    """

    def __init__(self, params: Sequence[Param], learner: str | None = None, where: str = "space"):
        params = tuple(params)
        names = [p.name for p in params]
        if len(set(names)) != len(names):
            dup = sorted({n for n in names if names.count(n) > 1})
            raise SpaceError(f"{where}: parameter name(s) {dup} appear more than once")
        if not params:
            raise SpaceError(f"{where}: a space needs at least one parameter under 'params'")
        self.params = params
        self.learner = learner
        self._index = {p.name: i for i, p in enumerate(params)}
        for p in params:
            for parent, levels in p.when:
                if parent not in self._index:
                    raise SpaceError(
                        f"{where}: parameter {p.name!r} is conditional on {parent!r}, "
                        f"which is not a parameter; known: {names}"
                    )
                pp = params[self._index[parent]]
                if pp.kind != "choice":
                    raise SpaceError(
                        f"{where}: parameter {p.name!r} is conditional on {parent!r}, "
                        "but conditions may only refer to choice parameters"
                    )
                for level in levels:
                    if pp.level_index(level) < 0:
                        raise SpaceError(
                            f"{where}: parameter {p.name!r} is conditional on {parent}={level!r}, "
                            f"which is not a level of {parent!r} ({pp.describe()})"
                        )
        self._order = self._topological_order(where)
        # asked for on every density evaluation: built once, read-only (the parameters never change)
        self._n_levels = np.array([p.n_levels for p in params], dtype=int)
        self._is_choice = np.array([p.kind == "choice" for p in params], dtype=bool)
        self._n_levels.flags.writeable = False
        self._is_choice.flags.writeable = False
        self._conditional = any(p.when for p in params)

    # -- construction ------------------------------------------------------
    def _topological_order(self, where: str) -> list[int]:
        order: list[int] = []
        state: dict[int, int] = {}

        def visit(i: int, path: list[str]) -> None:
            if state.get(i) == 2:
                return
            if state.get(i) == 1:
                raise SpaceError(f"{where}: conditions form a cycle: {' -> '.join(path)}")
            state[i] = 1
            for parent, _ in self.params[i].when:
                visit(self._index[parent], path + [parent])
            state[i] = 2
            order.append(i)

        for i, p in enumerate(self.params):
            visit(i, [p.name])
        return order

    @classmethod
    def from_dict(cls, d: Mapping, where: str = "space") -> "Space":
        """Build a space from ``{"params": {name: {"type": ..., ...}}}``."""
        if not isinstance(d, Mapping):
            raise SpaceError(f"{where}: a space must be an object with 'params', got {type(d).__name__}")
        unknown = set(d) - _SPACE_KEYS
        if unknown:
            raise SpaceError(
                f"{where}: unknown top-level key(s) {sorted(unknown)}; allowed: {sorted(_SPACE_KEYS)}"
            )
        params = d.get("params")
        if not isinstance(params, Mapping) or not params:
            raise SpaceError(
                f"{where}: needs a non-empty 'params' table mapping parameter names to their "
                "definitions, e.g. {\"params\": {\"C\": {\"type\": \"real\", \"low\": 0.001, \"high\": 1000, \"log\": true}}}"
            )
        parsed = [_parse_param(name, spec, where) for name, spec in params.items()]
        learner = d.get("learner")
        return cls(parsed, learner=learner, where=where)

    @classmethod
    def load(cls, path: str | Path) -> "Space":
        """Load a space from a ``.json`` or ``.toml`` file."""
        path = Path(path)
        where = str(path)
        try:
            raw = path.read_bytes()
        except OSError as exc:
            raise SpaceError(f"{where}: cannot read space file ({exc.strerror})") from None
        suffix = path.suffix.lower()
        try:
            if suffix == ".toml":
                d = tomllib.loads(raw.decode("utf-8"))
            elif suffix == ".json":
                d = json.loads(raw.decode("utf-8"))
            else:
                raise SpaceError(f"{where}: space files must end in .json or .toml, got {suffix!r}")
        except (json.JSONDecodeError, tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
            raise SpaceError(f"{where}: not a valid {suffix[1:].upper()} file: {exc}") from None
        return cls.from_dict(d, where=where)

    def to_dict(self) -> dict:
        """Plain-data form (the inverse of :meth:`from_dict`)."""
        d: dict[str, Any] = {"params": {p.name: p.to_dict() for p in self.params}}
        if self.learner:
            d["learner"] = self.learner
        return d

    def to_json(self) -> str:
        """Canonical JSON text of the space (sorted keys, no spaces)."""
        return json.dumps(self.to_dict(), sort_keys=True, separators=(",", ":"))

    @property
    def content_hash(self) -> str:
        """SHA-256 of the canonical JSON of the parameters (learner excluded)."""
        body = json.dumps({"params": self.to_dict()["params"]}, sort_keys=True, separators=(",", ":"))
        return hashlib.sha256(body.encode("utf-8")).hexdigest()

    def save(self, path: str | Path) -> None:
        """Write the space as ``.json`` or ``.toml`` (by the file's extension)."""
        path = Path(path)
        suffix = path.suffix.lower()
        if suffix == ".json":
            path.write_text(json.dumps(self.to_dict(), indent=2) + "\n", encoding="utf-8")
        elif suffix == ".toml":
            import tomli_w  # writes TOML; the standard library only reads it

            path.write_text(tomli_w.dumps(self.to_dict()), encoding="utf-8")
        else:
            raise SpaceError(f"{path}: space files must end in .json or .toml, got {suffix!r}")

    # -- basic facts -------------------------------------------------------
    def __len__(self) -> int:
        return len(self.params)

    def __iter__(self):
        return iter(self.params)

    def __contains__(self, name: object) -> bool:
        return name in self._index

    def __getitem__(self, name: str) -> Param:
        return self.params[self._index[name]]

    def __eq__(self, other: object) -> bool:
        return isinstance(other, Space) and self.to_dict()["params"] == other.to_dict()["params"]

    def __hash__(self) -> int:
        return hash(self.content_hash)

    def __repr__(self) -> str:
        inner = ", ".join(f"{p.name}: {p.describe()}" for p in self.params)
        return f"Space({inner})"

    @property
    def names(self) -> list[str]:
        """Parameter names in order."""
        return [p.name for p in self.params]

    @property
    def dim(self) -> int:
        """Number of encoded coordinates (one per parameter)."""
        return len(self.params)

    @property
    def n_levels(self) -> np.ndarray:
        """Per coordinate: number of levels of choice/integer, 0 for real (read-only)."""
        return self._n_levels

    @property
    def is_choice(self) -> np.ndarray:
        """Boolean mask of ``choice`` coordinates (read-only)."""
        return self._is_choice

    @property
    def conditional(self) -> bool:
        """True when any parameter has a condition."""
        return self._conditional

    # -- validation --------------------------------------------------------
    def is_active(self, config: Mapping, name: str) -> bool:
        """Whether parameter ``name`` is active given the values in ``config``."""
        p = self[name]
        for parent, levels in p.when:
            if not self.is_active(config, parent) or parent not in config:
                return False
            pp = self[parent]
            idx = pp.level_index(config[parent])
            if idx < 0 or all(pp.level_index(level) != idx for level in levels):
                return False
        return True

    def check_value(self, name: str, value: Any) -> Any:
        """Return ``value`` as the canonical Python value of parameter ``name``.

        Raises
        ------
        SpaceError
            Naming the parameter, the value and what is allowed.
        """
        p = self[name]
        value = plain_value(value)
        if p.kind == "choice":
            idx = p.level_index(value)
            if idx < 0:
                raise SpaceError(f"parameter {name!r}: value {value!r} is not allowed; {p.describe()}")
            return p.choices[idx]
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise SpaceError(f"parameter {name!r}: value {value!r} is not a number; {p.describe()}")
        if not math.isfinite(value):
            raise SpaceError(f"parameter {name!r}: value {value!r} is not finite; {p.describe()}")
        if p.kind == "integer":
            if float(value) != int(value):
                raise SpaceError(f"parameter {name!r}: value {value!r} is not a whole number; {p.describe()}")
            value = int(value)
        else:
            value = float(value)
        if value < p.low or value > p.high:
            raise SpaceError(f"parameter {name!r}: value {value!r} is out of range; {p.describe()}")
        return value

    def validate(self, config: Mapping) -> None:
        """Raise :class:`SpaceError` unless ``config`` is a valid config.

        A valid config holds exactly the active parameters, each within its
        kind and bounds.
        """
        if not isinstance(config, Mapping):
            raise SpaceError(f"a config must be a mapping of parameter names to values, got {config!r}")
        unknown = [k for k in config if k not in self._index]
        if unknown:
            raise SpaceError(f"config has unknown parameter(s) {unknown}; the space has {self.names}")
        for i in self._order:
            p = self.params[i]
            active = self.is_active(config, p.name)
            if active and p.name not in config:
                raise SpaceError(f"config lacks parameter {p.name!r} ({p.describe()})")
            if not active and p.name in config:
                conds = ", ".join(f"{a} in {list(b)}" for a, b in p.when)
                raise SpaceError(
                    f"parameter {p.name!r} is inactive in this config (it needs {conds}); leave it out"
                )
            if active:
                self.check_value(p.name, config[p.name])

    def normalize(self, config: Mapping) -> dict:
        """Return a validated copy with canonical Python values, in space order."""
        self.validate(config)
        return {p.name: self.check_value(p.name, config[p.name]) for p in self.params if p.name in config}

    def canonical_json(self, config: Mapping) -> str:
        """Canonical JSON of a config (validated; sorted keys, no spaces)."""
        return json.dumps(self.normalize(config), sort_keys=True, separators=(",", ":"))

    # -- encoding ----------------------------------------------------------
    def encode(self, configs: Iterable[Mapping]) -> np.ndarray:
        """Encode configs as an (n, d) array; inactive parameters are NaN.

        Values are taken as given (validate first when they come from outside).
        """
        configs = list(configs)
        X = np.full((len(configs), self.dim), np.nan)
        for j, p in enumerate(self.params):
            rows = [i for i, c in enumerate(configs) if p.name in c and c[p.name] is not None]
            if not rows:
                continue
            if p.kind == "choice":
                X[rows, j] = [p.level_index(configs[i][p.name]) for i in rows]
            else:
                X[rows, j] = p.to_unit(np.array([configs[i][p.name] for i in rows], dtype=float))
        return X

    def active_mask(self, X: np.ndarray) -> np.ndarray:
        """Boolean (n, d) mask of the coordinates active under the parents' values."""
        X = np.atleast_2d(np.asarray(X, dtype=float))
        active = np.ones(X.shape, dtype=bool)
        for i in self._order:
            p = self.params[i]
            for parent, levels in p.when:
                j = self._index[parent]
                pp = self.params[j]
                allowed = [pp.level_index(level) for level in levels]
                ok = np.isin(np.nan_to_num(X[:, j], nan=-1.0), allowed) & active[:, j]
                active[:, i] &= ok
        return active

    def snap(self, X: np.ndarray) -> np.ndarray:
        """Snap encoded rows onto valid points: clip, round choices, centre
        integers in their cell, and mark inactive coordinates NaN."""
        X = np.array(np.atleast_2d(X), dtype=float)
        for j, p in enumerate(self.params):
            col = X[:, j]  # a view: written in place; NaN (inactive) stays NaN through round and clip
            if p.kind == "choice":
                np.clip(np.round(col), 0, p.n_levels - 1, out=col)
            elif p.kind == "integer":
                ok = ~np.isnan(col)
                col[ok] = p.to_unit(p.from_unit(col[ok]))
            else:
                np.clip(col, 0.0, 1.0, out=col)
        if self._conditional:  # without conditions every coordinate is active
            X[~self.active_mask(X)] = np.nan
        return X

    def from_unit(self, U: np.ndarray) -> np.ndarray:
        """Map points of the unit cube [0, 1)^d to encoded rows.

        ``choice`` coordinates become level indices ``floor(u * k)``; inactive
        coordinates become NaN.
        """
        U = np.atleast_2d(np.asarray(U, dtype=float))
        X = U.copy()
        for j, p in enumerate(self.params):
            if p.kind == "choice":
                X[:, j] = np.minimum(np.floor(U[:, j] * p.n_levels), p.n_levels - 1)
        return self.snap(X)

    def decode(self, X: np.ndarray) -> list[dict]:
        """Decode encoded rows into configs (inverse of :meth:`encode`)."""
        X = self.snap(X)
        cols: list[list] = []
        for j, p in enumerate(self.params):
            col = X[:, j]
            if p.kind == "choice":
                cols.append([None if np.isnan(v) else p.choices[int(v)] for v in col])
            else:
                missing = np.isnan(col)
                vals = (np.where(missing, np.nan, p.from_unit(np.nan_to_num(col))) if missing.any()
                        else p.from_unit(col))
                if p.kind == "integer":
                    cols.append([None if np.isnan(v) else int(v) for v in vals])
                else:
                    cols.append([None if np.isnan(v) else float(v) for v in vals])
        names = self.names
        return [
            {names[j]: cols[j][i] for j in range(self.dim) if cols[j][i] is not None}
            for i in range(X.shape[0])
        ]

    # -- sampling ----------------------------------------------------------
    def sample_unit(self, n: int, rng: Any = None) -> np.ndarray:
        """n uniform draws from the space, encoded, as an (n, d) array."""
        rng = np.random.default_rng(rng)
        return self.from_unit(rng.random((n, self.dim)))

    def sample(self, n: int, rng: Any = None) -> list[dict]:
        """n configs drawn uniformly from the space."""
        return self.decode(self.sample_unit(n, rng))

    def sobol_unit(self, n: int, rng: Any = None) -> np.ndarray:
        """First n points of a scrambled Sobol sequence, encoded, (n, d).

        Uses :class:`scipy.stats.qmc.Sobol` with ``scramble=True``; points are
        taken from a draw of ``2**ceil(log2(n))`` so the balance warning of
        SciPy does not apply.
        """
        from scipy.stats import qmc  # SciPy's stats take ~0.8 s to import; only designs need them

        rng = np.random.default_rng(rng)
        m = max(0, math.ceil(math.log2(max(n, 1))))
        engine = qmc.Sobol(d=self.dim, scramble=True, rng=rng)
        return self.from_unit(engine.random_base2(m)[:n])

    def sobol(self, n: int, rng: Any = None) -> list[dict]:
        """n configs from a scrambled Sobol design."""
        return self.decode(self.sobol_unit(n, rng))

    def complete(self, config: Mapping, rng: Any = None) -> dict:
        """Fill the missing active parameters of a partial config uniformly.

        Values already present are kept; values that are inactive once the
        parents are known are dropped. The result is a valid config.
        """
        rng = np.random.default_rng(rng)
        out: dict = {}
        for i in self._order:
            p = self.params[i]
            if not self.is_active(out, p.name):
                continue
            if p.name in config and config[p.name] is not None:
                out[p.name] = self.check_value(p.name, config[p.name])
            else:
                u = rng.random(1)
                if p.kind == "choice":
                    out[p.name] = p.choices[min(int(u[0] * p.n_levels), p.n_levels - 1)]
                elif p.kind == "integer":
                    out[p.name] = int(p.from_unit(u)[0])
                else:
                    out[p.name] = float(p.from_unit(u)[0])
        return {p.name: out[p.name] for p in self.params if p.name in out}

    # -- alignment ---------------------------------------------------------
    def align(self, config: Mapping, from_space: "Space | None" = None) -> Alignment:
        """Carry a config recorded over another space onto this one.

        Parameters are matched by name. ``real`` and ``integer`` values move
        between each other (rounded for integer) and are clipped into this
        space's bounds; ``choice`` levels carry over when this space has the
        same level. A value this space cannot take is dropped; active
        parameters with no value are reported as missing.

        Parameters
        ----------
        config : mapping
            The config as recorded.
        from_space : Space, optional
            The space it was recorded over (used to tell kinds apart).
        """
        clipped: list[str] = []
        dropped: list[str] = []
        carried: dict = {}
        for name, value in config.items():
            value = plain_value(value)
            if name not in self._index or value is None:
                dropped.append(name)
                continue
            p = self[name]
            if p.kind == "choice":
                idx = p.level_index(value)
                if idx < 0:
                    dropped.append(name)
                else:
                    carried[name] = p.choices[idx]
                continue
            if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
                dropped.append(name)
                continue
            v = float(value)
            if p.kind == "integer":
                v = float(math.floor(v + 0.5))
            if v < p.low or v > p.high:
                clipped.append(name)
                v = min(max(v, p.low), p.high)
            carried[name] = int(v) if p.kind == "integer" else v
        out: dict = {}
        missing: list[str] = []
        for i in self._order:
            p = self.params[i]
            if not self.is_active(out, p.name):
                if p.name in carried:
                    dropped.append(p.name)
                continue
            if p.name in carried:
                out[p.name] = carried[p.name]
            else:
                missing.append(p.name)
        ordered = {p.name: out[p.name] for p in self.params if p.name in out}
        return Alignment(
            config=ordered,
            clipped=tuple(c for c in clipped if c in ordered),
            dropped=tuple(dict.fromkeys(dropped)),
            missing=tuple(missing),
        )


def unit_distances(space: Space, A: np.ndarray, B: np.ndarray) -> np.ndarray:
    """Squared distances between encoded rows, (len(A), len(B)).

    Continuous coordinates add the squared difference on the unit scale; a
    choice coordinate adds 1 when the levels differ; a coordinate active in
    one row and inactive in the other adds 1, inactive in both adds 0.
    """
    A = np.atleast_2d(A)
    B = np.atleast_2d(B)
    choice = space.is_choice
    total = np.zeros((A.shape[0], B.shape[0]))
    for j in range(space.dim):
        a = A[:, j][:, None]
        b = B[:, j][None, :]
        na, nb = np.isnan(a), np.isnan(b)
        if choice[j]:
            diff = (a != b).astype(float)
        else:
            diff = (a - b) ** 2
        diff = np.where(na & nb, 0.0, np.where(na | nb, 1.0, diff))
        total += diff
    return total
