"""Fixed lists of configs: the static orders a learning search must beat.

A static order tries past configs in an order fixed before the first score
comes in. Two are strong published baselines for transfer, and both are
built here from a prior's past studies (its sources):

:func:`average_rank_list`
    the prior's candidate configs ranked by their mean within-study
    quantile across every past study, unweighted ("learned defaults": what
    is good across all tasks);
:func:`nearest_tasks_list`
    the best config of each past study in order of profile distance, then
    the second best of each, and so on (the nearest-datasets start).

:class:`FixedListSearch` proposes any such list, in order, through the one
loop (:func:`~warmstart.search.strategy.run_search`) like every other
strategy. It ignores the scores it is told. When its list is used up,
``propose`` raises :class:`~warmstart.search.strategy.SearchError`: the
static order has nothing more to say, and anything proposed past its end
would be another strategy's proposal. Run it for at most
:attr:`FixedListSearch.remaining` trials; the replay scores the queries a
short list did not make as misses (see :mod:`warmstart.gain.replay`).
"""

from __future__ import annotations

from typing import Any, Mapping, Sequence

import numpy as np

from warmstart._checks import check_count
from warmstart.search.strategy import SearchError, SearchStrategy
from warmstart.space import Space

__all__ = ["FixedListSearch", "average_rank_list", "nearest_tasks_list"]


class FixedListSearch(SearchStrategy):
    """Propose a fixed list of configs in order (a static order).

    Parameters
    ----------
    space : Space
        The search space.
    configs : sequence of mapping
        The list, first proposal first; every config must be valid in
        ``space`` (repeats are allowed and proposed again).
    seed : int or numpy Generator, default 0
        Unused (the list is fixed); accepted so every strategy is built alike.
    maximize : bool, default True
        Whether larger scores are better (for :attr:`best`).

    Raises
    ------
    SpaceError
        A config of the list is not valid in ``space``.

    Examples
    --------
    >>> space = Space.from_dict({"params": {"x": {"type": "real", "low": 0, "high": 1}}})
    >>> search = FixedListSearch(space, [{"x": 0.5}, {"x": 0.25}])
    >>> search.propose(), search.remaining
    ({'x': 0.5}, 1)
    """

    def __init__(self, space: Space, configs: Sequence[Mapping], seed: Any = 0, maximize: bool = True):
        super().__init__(space, seed=seed, maximize=maximize)
        self.configs = [space.normalize(c) for c in configs]
        self._next = 0

    @property
    def remaining(self) -> int:
        """Configs of the list not proposed yet."""
        return len(self.configs) - self._next

    def _propose_one(self) -> tuple[dict, str]:
        if self._next >= len(self.configs):
            raise SearchError(
                f"the fixed list of {len(self.configs)} config(s) is used up; a static order proposes "
                f"nothing past its end, so run it for at most {len(self.configs)} trial(s)"
            )
        config = self.configs[self._next]
        self._next += 1
        return dict(config), "list"


def average_rank_list(prior: Any, n: int) -> list[dict]:
    """The prior's candidates ranked by mean within-study quantile, best first.

    Every past study counts alike (the prior's similarity weights are not
    used): this is the order that is good across all tasks.

    Parameters
    ----------
    prior : Prior
        Offers ``space``, ``candidates`` (encoded rows) and
        ``candidate_quantiles`` (one column per past study).
    n : int
        Length of the list (shorter when the prior has fewer candidates).

    Returns
    -------
    list of dict
        Valid configs; a parameter no past study had is drawn uniformly
        (seed 0), as in the prior's own seeds.
    """
    n = check_count("n", n, minimum=0, error=SearchError)
    scores = prior.candidate_quantiles.mean(axis=1)
    order = np.argsort(-scores, kind="stable")[:n]
    return [prior.space.complete(c, 0) for c in prior.space.decode(prior.candidates[order])]


def nearest_tasks_list(prior: Any, n: int) -> list[dict]:
    """The best config of each past study by profile distance, then the second best, ...

    Parameters
    ----------
    prior : Prior
        Offers ``space`` and ``sources`` (each with ``distance``,
        ``study_id``, encoded rows ``X`` and within-study ``quantile``).
    n : int
        Length of the list (shorter when the studies hold fewer distinct
        configs).

    Returns
    -------
    list of dict
        Distinct valid configs, nearest study's best first.
    """
    n = check_count("n", n, minimum=0, error=SearchError)
    space = prior.space
    by_distance = sorted(prior.sources, key=lambda s: (s.distance, s.study_id))
    out, keys, depth = [], set(), 0
    while len(out) < n and depth < max(s.X.shape[0] for s in by_distance):
        for s in by_distance:
            order = np.argsort(-s.quantile, kind="stable")
            if depth < len(order):
                cfg = space.complete(space.decode(s.X[order[depth]][None, :])[0], 0)
                key = space.canonical_json(cfg)
                if key not in keys:
                    keys.add(key)
                    out.append(cfg)
            if len(out) >= n:
                break
        depth += 1
    return out
