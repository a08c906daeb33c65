"""What the lease book asks of the studies' searches, in one interface.

The lease book (:mod:`warmstart.service.leases`) keeps leases, trial numbers
and rows; everything it does to a study's
:class:`~warmstart.search.strategy.SearchStrategy` goes through a
:class:`Proposer`: adopt a study's search (with the pending leases of a
resumed one), propose ``k`` configs distinct from the pending ones, release
expired ones, record a result, forget one study or all.

Each of those is a small message (a frozen dataclass) applied to the
proposer's table of :class:`HeldSearch` (one per study). The in-process
proposer (:class:`InProcessProposer`) applies it at once; the child-process
proposer (:class:`~warmstart.service.search_process.ChildProcessProposer`)
sends it, pickled, to a process of its own that applies the very same
message, so that both give the same proposals for the same seeds and
history, while the search's computation runs on another core than the
service's HTTP and archive writes (Python runs one thread at a time per
process). Only a proposal is answered; everything else is sent without
waiting, the lease book keeps what its answers need (trial count, best
score) itself. The lease book asks for all the proposals of a writer batch
at once (:meth:`Proposer.ask_many`) and reads their answer after it has
written the batch's other rows.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from typing import Any, Callable, ClassVar, Iterable

from warmstart.errors import WarmstartError
from warmstart.search.strategy import SearchStrategy

__all__ = ["Proposer", "InProcessProposer", "HeldSearch", "NoConfigLeft", "SearchesLost", "MAX_DRAWS",
           "Adopt", "Propose", "ProposeMany", "Release", "Record", "Forget", "Studies", "Stop", "Message", "Bundle"]

MAX_DRAWS = 8  # extra proposals tried when one repeats a pending config


class NoConfigLeft(WarmstartError):
    """Every config the search proposed is pending already.

    Parameters
    ----------
    pending : int
        Configs pending when the search gave up.
    study, k : int, optional
        The study and the number of configs asked for (when known).
    """

    def __init__(self, pending: int, study: int | None = None, k: int | None = None):
        super().__init__(pending, study, k)
        self.pending, self.study, self.k = int(pending), study, k

    def __str__(self) -> str:
        return f"no config left that is not pending already ({self.pending} leased)"


class SearchesLost(WarmstartError):
    """The searches are gone (the search process ended or one study's search
    failed there): the caller drops what it keeps of them and rebuilds each
    from the archive when it is used next."""


class HeldSearch:
    """One study's search with its pending configs (canonical JSON).

    Parameters
    ----------
    search : SearchStrategy
    held : iterable of str, optional
        Canonical JSON of configs leased earlier and not recorded (a study
        resumed from the archive): held pending in the search.
    """

    def __init__(self, search: SearchStrategy, held: Iterable[str] = ()):
        self.search = search
        self.pending: set[str] = set()
        for key in held:
            search.hold(json.loads(key), source="lease")
            self.pending.add(key)

    def propose(self, k: int) -> list[tuple[str, dict]]:
        """``k`` configs, none pending already, each held before the next is
        drawn; returns (canonical JSON, config) pairs.

        Raises
        ------
        NoConfigLeft
            ``MAX_DRAWS + 1`` proposals in a row repeated pending configs.
        """
        search, space, pending = self.search, self.search.space, self.pending
        leased: list[tuple[str, dict]] = []
        for _ in range(k):
            for _attempt in range(MAX_DRAWS + 1):
                config = search.propose()
                key = space.canonical_json(config)
                if key not in pending:
                    break
                search.release(config)  # a repeat of a pending config: not handed out
            else:
                raise NoConfigLeft(len(pending))
            pending.add(key)
            leased.append((key, config))
        return leased

    def release(self, keys: Iterable[str]) -> None:
        """Configs of expired leases: no longer pending."""
        for key in keys:
            self.search.release(json.loads(key))
            self.pending.discard(key)

    def record(self, key: str, score: float | None, status: str) -> None:
        """The result of a config (canonical JSON), proposed or not."""
        self.pending.discard(key)
        self.search.record(json.loads(key), score, status)


# -- messages: what a proposer does, as data a child process can be sent ----------------------
@dataclass(frozen=True)
class Message:
    """Base of the messages; ``answered``: the sender waits for the result of :meth:`apply`."""

    answered: ClassVar[bool] = False

    def apply(self, held: dict[int, HeldSearch]) -> Any:  # pragma: no cover - abstract
        raise NotImplementedError


def _held(held: dict[int, HeldSearch], study: int) -> HeldSearch:
    try:
        return held[study]
    except KeyError:
        raise SearchesLost(f"the search of study {study} is not held (lost after a failure)") from None


@dataclass(frozen=True)
class Adopt(Message):
    """Keep ``search`` for ``study`` (replacing any), holding ``held`` pending."""

    study: int
    search: SearchStrategy
    held: tuple[str, ...] = ()

    def apply(self, held: dict[int, HeldSearch]) -> None:
        held[self.study] = HeldSearch(self.search, self.held)


@dataclass(frozen=True)
class Propose(Message):
    """``k`` distinct configs of ``study`` (:meth:`HeldSearch.propose`)."""

    answered: ClassVar[bool] = True
    study: int
    k: int

    def apply(self, held: dict[int, HeldSearch]) -> list[tuple[str, dict]]:
        return _held(held, self.study).propose(self.k)


@dataclass(frozen=True)
class ProposeMany(Message):
    """For each (study, k) in turn, ``k`` distinct configs of the study: one
    list of (canonical JSON, config) pairs per item. The first failure stops
    (a :class:`NoConfigLeft` names its study and k)."""

    answered: ClassVar[bool] = True
    items: tuple[tuple[int, int], ...]

    def apply(self, held: dict[int, HeldSearch]) -> list[list[tuple[str, dict]]]:
        out = []
        for study, k in self.items:
            try:
                out.append(_held(held, study).propose(k))
            except NoConfigLeft as exc:
                raise NoConfigLeft(exc.pending, study, k) from None
        return out


@dataclass(frozen=True)
class Release(Message):
    """Configs of expired leases of ``study``."""

    study: int
    keys: tuple[str, ...]

    def apply(self, held: dict[int, HeldSearch]) -> None:
        _held(held, self.study).release(self.keys)


@dataclass(frozen=True)
class Record(Message):
    """A result of ``study``."""

    study: int
    key: str
    score: float | None
    status: str

    def apply(self, held: dict[int, HeldSearch]) -> None:
        _held(held, self.study).record(self.key, self.score, self.status)


@dataclass(frozen=True)
class Forget(Message):
    """Drop one study's search, or every one (``study`` None)."""

    study: int | None = None

    def apply(self, held: dict[int, HeldSearch]) -> None:
        if self.study is None:
            held.clear()
        else:
            held.pop(self.study, None)


@dataclass(frozen=True)
class Studies(Message):
    """The studies whose searches are held (sorted)."""

    answered: ClassVar[bool] = True

    def apply(self, held: dict[int, HeldSearch]) -> list[int]:
        return sorted(held)


@dataclass(frozen=True)
class Stop(Message):
    """The child process ends (never applied)."""


@dataclass(frozen=True)
class Bundle:
    """Messages sent together, applied in order; answered when the last one is."""

    messages: tuple[Message, ...]

    @property
    def answered(self) -> bool:
        return bool(self.messages) and self.messages[-1].answered


# -- the interface and the in-process proposer -----------------------------------------------
class Proposer:
    """The studies' searches, behind one interface (base of both proposers).

    Every method runs in the service's writer thread (``start`` and
    ``close`` with the service). Subclasses say how a message reaches the
    searches (:meth:`_send`).
    """

    #: whether the searches run in a child process
    in_child: ClassVar[bool] = False

    def start(self) -> None:
        """Get ready (the child-process proposer starts its process)."""

    def close(self) -> None:
        """Drop every search (the child-process proposer also stops and joins its process)."""
        self._send(Forget(None))

    def _send(self, message: Message) -> Any:
        """Apply ``message`` to the searches; its result when it is answered."""
        raise NotImplementedError  # pragma: no cover - abstract

    def adopt(self, study: int, search: SearchStrategy, held: Iterable[str] = ()) -> None:
        """Keep ``search`` for ``study``, with ``held`` (canonical JSON of the
        configs of pending leases) held pending in it."""
        self._send(Adopt(int(study), search, tuple(held)))

    def propose(self, study: int, k: int) -> list[tuple[str, dict]]:
        """``k`` configs of ``study``, distinct from every pending one and from
        each other, each pending from now on: (canonical JSON, config) pairs.

        Raises
        ------
        NoConfigLeft
            No config left that is not pending already.
        SearchesLost
            The searches are gone; drop what is kept of them and rebuild.
        """
        return self._send(Propose(int(study), int(k)))

    def propose_many(self, items: Iterable[tuple[int, int]]) -> list[list[tuple[str, dict]]]:
        """:meth:`propose` for each (study, k) in turn, in one exchange: one list per item.

        Raises
        ------
        NoConfigLeft
            For the first item that has no config left (its ``study`` and ``k`` set).
        SearchesLost
            As :meth:`propose`.
        """
        return self._send(ProposeMany(tuple((int(study), int(k)) for study, k in items)))

    def ask_many(self, items: Iterable[tuple[int, int]]) -> Callable[[], list[list[tuple[str, dict]]]]:
        """:meth:`propose_many`, answered later: returns a function that gives the
        answer (or raises as :meth:`propose_many`). Call it before anything else
        is asked of the searches; meanwhile a child process draws the configs
        while this process does other work (the archive's writes)."""
        try:
            drawn = self.propose_many(items)
        except (NoConfigLeft, SearchesLost) as exc:
            error = exc

            def fail() -> list:
                raise error
            return fail
        return lambda: drawn

    def sync(self) -> None:
        """Deliver the messages sent without an answer (the child-process
        proposer may keep them to send with the next); raises
        :class:`SearchesLost` when the searches are gone."""

    def release(self, study: int, keys: Iterable[str]) -> None:
        """Configs (canonical JSON) of expired leases of ``study``: no longer pending."""
        keys = tuple(keys)
        if keys:
            self._send(Release(int(study), keys))

    def record(self, study: int, key: str, score: float | None, status: str) -> None:
        """A result of ``study`` for the config ``key`` (canonical JSON)."""
        self._send(Record(int(study), key, score, status))

    def forget(self, study: int | None = None) -> None:
        """Drop the search of one study, or every one."""
        self._send(Forget(None if study is None else int(study)))

    def studies(self) -> list[int]:
        """The studies whose searches are held, sorted."""
        return self._send(Studies())


class InProcessProposer(Proposer):
    """The searches in this process: each message applied at once."""

    def __init__(self) -> None:
        self._held: dict[int, HeldSearch] = {}

    def _send(self, message: Message) -> Any:
        return message.apply(self._held)
