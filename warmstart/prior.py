"""The prior: a density over a space built from similar past studies.

How a prior is built (DESIGN §6):

1. every past study of the learner is a *source*; its recorded configs are
   carried onto the new space with :meth:`Space.align` (clipped values are
   down-weighted, missing parameters stay NaN = uniform in the kernel);
2. scores become within-study quantiles (1 = best), because score scales
   differ across tasks;
3. each source gets a similarity weight from profile distance (all sources
   contribute: with no clearly closer task the prior tends to what is good
   across all tasks);
4. the top fraction of each source become kernel centres weighted by
   similarity x quality, in a :class:`~warmstart.search.kde.MixedKDE` whose
   bandwidths follow the spread of the centres;
5. the strength ``n0`` is the effective number of sources times how much
   they agree (rank correlation of their predicted quantiles).

Once the new study has scores, :meth:`Prior.reweight` re-weights the sources
by how well each one's ranking agrees with them (pairwise concordance), which
is what lets a warm search learn, from its first few scores, which past tasks
to trust. :attr:`Prior.seeds` lists the configs to try first, ranked by the
similarity-weighted mean quantile they had in the sources.
"""

from __future__ import annotations

import hashlib
import json
import math
from dataclasses import dataclass, field
from typing import Any, Mapping, Sequence

import numpy as np
from scipy.stats import rankdata

from warmstart.errors import WarmstartError
from warmstart.search.kde import MixedKDE
from warmstart.space import Space, unit_distances

__all__ = ["Prior", "PriorError", "Source", "prior_from_sources", "within_study_quantiles", "unit_distances",
           "RECIPE_FORMAT"]

#: Format tag of :meth:`Prior.recipe`.
RECIPE_FORMAT = "warmstart-prior-recipe/1"

#: Probability that a source orders a pair of configs wrongly, in the
#: pairwise-concordance re-weighting (our choice; 0.25 keeps one lucky pair
#: from deciding, while ten observations separate sources clearly).
PAIR_ERROR = 0.25
#: Largest prior strength n0 (in pseudo-observations).
MAX_STRENGTH = 25.0
#: Prior kernel bandwidths are this multiple of Scott's rule on the centres'
#: effective number (1 = the rule as scipy.stats.gaussian_kde applies it; a
#: narrower 0.5 did no better on our synthetic families).
BANDWIDTH_FACTOR = 1.0


class PriorError(WarmstartError, ValueError):
    """A prior cannot be built or loaded as asked."""


@dataclass
class Source:
    """One past study seen from the new space.

    Attributes
    ----------
    study_id, task_id : int
    task : str
    X : ndarray (m, d)
        Recorded ok configs, aligned and encoded in the *new* space.
    quantile : ndarray (m,)
        Within-study quantile of each config's score (1 = best).
    numbers : ndarray (m,)
        Trial numbers, for provenance.
    clipped : ndarray (m,) of bool
        Configs with a value clipped into the new bounds.
    similarity : float
        Similarity weight from the profile distance (before normalising).
    distance : float
        Profile distance (for reports).
    notes : dict
        What alignment dropped, clipped or found missing (parameter names).
    """

    study_id: int
    task_id: int
    task: str
    X: np.ndarray
    quantile: np.ndarray
    numbers: np.ndarray
    clipped: np.ndarray
    similarity: float = 1.0
    distance: float = float("nan")
    notes: dict = field(default_factory=dict)

    @property
    def digest(self) -> str:
        """Hash of what a prior takes from this source: its aligned configs,
        their quantiles and clipped flags (16 hex digits of SHA-256)."""
        h = hashlib.sha256()
        X = np.asarray(self.X, dtype=float)
        h.update(str(X.shape).encode())
        h.update(np.ascontiguousarray(np.where(np.isnan(X), -1.0, X)).tobytes())  # one spelling of "inactive"
        h.update(np.ascontiguousarray(np.asarray(self.quantile, dtype=float)).tobytes())
        h.update(np.ascontiguousarray(np.asarray(self.clipped, dtype=bool)).tobytes())
        return h.hexdigest()[:16]


def within_study_quantiles(scores: Sequence[float], maximize: bool = True) -> np.ndarray:
    """Quantile of each score within its study: (rank - 0.5) / n, 1 = best.

    Ties share their mean rank (``scipy.stats.rankdata``).
    """
    s = np.asarray(scores, dtype=float)
    if s.size == 0:
        return s
    r = rankdata(s if maximize else -s, method="average")
    return (r - 0.5) / s.size


def _nearest_quantiles(space: Space, source: Source, X: np.ndarray) -> np.ndarray:
    """Quantile a source predicts for rows X: that of its nearest recorded config."""
    if source.X.shape[0] == 0:
        return np.full(X.shape[0], 0.5)
    D = unit_distances(space, X, source.X)
    return source.quantile[np.argmin(D, axis=1)]


def _concordance(pred: np.ndarray, y: np.ndarray) -> float:
    """(concordant - discordant) pairs between a prediction and observations."""
    dp = np.sign(pred[:, None] - pred[None, :])
    dy = np.sign(y[:, None] - y[None, :])
    iu = np.triu_indices(len(y), k=1)
    prod = (dp * dy)[iu]
    return float(prod.sum())


class Prior:
    """A density over a space built from past studies, with provenance.

    Build one with :func:`warmstart.archive.Archive.build_prior` (or
    :func:`prior_from_sources`). It follows the protocol the density search
    uses: :attr:`strength`, :meth:`sample_unit`, :meth:`logpdf_unit`,
    :attr:`seeds` and :meth:`reweight`.

    Parameters
    ----------
    space : Space
        The space the prior lives in.
    sources : list of Source
        The past studies it was built from.
    weights : array (n_sources,)
        Normalised source weights.
    top_fraction : float
        Share of each source's configs used as kernel centres.
    provenance : dict
        Extra provenance (learner, profile version, options).
    """

    def __init__(
        self,
        space: Space,
        sources: list[Source],
        weights: np.ndarray,
        top_fraction: float = 0.2,
        provenance: Mapping | None = None,
        n_seeds: int = 10,
    ):
        if not sources:
            raise PriorError("a prior needs at least one past study with successful trials")
        self.space = space
        self.sources = sources
        w = np.asarray(weights, dtype=float)
        self.weights = w / w.sum()
        self.top_fraction = float(top_fraction)
        self.n_seeds = int(n_seeds)
        self.info = dict(provenance or {})
        self._build()

    # -- construction ------------------------------------------------------
    def _build(self) -> None:
        """Everything that does not depend on the source weights: centres,
        their quality within their study, candidate seeds and the quantile
        every source predicts for every candidate."""
        space = self.space
        centres, quality_all, owner, origin = [], [], [], []
        for i, s in enumerate(self.sources):
            m = s.X.shape[0]
            if m == 0:
                continue
            n_top = max(1, int(math.ceil(self.top_fraction * m)))
            order = np.argsort(-s.quantile, kind="stable")[:n_top]
            thr = s.quantile[order[-1]]
            quality = s.quantile[order] - thr + 1.0 / m
            quality = quality * np.where(s.clipped[order], 0.5, 1.0)
            centres.append(s.X[order])
            quality_all.append(quality / quality.sum())
            owner.append(np.full(len(order), i))
            origin.extend((i, int(j)) for j in order)
        if not centres:
            raise PriorError("no past study has a successful trial")
        self._centres = np.vstack(centres)
        self._quality = np.concatenate(quality_all)
        self._owner = np.concatenate(owner)
        self._centre_origin = origin
        cand = space.snap(self._centres)
        key = [json.dumps(c, sort_keys=True) for c in space.decode(cand)]
        _, first = np.unique(np.array(key), return_index=True)
        self._candidates = cand[np.sort(first)]
        self._Q = np.column_stack([_nearest_quantiles(space, s, self._candidates) for s in self.sources])
        # agreement is measured on every recorded config (up to 512 of them), not on the
        # candidates alone: near-top candidates are too alike to tell agreement from noise
        ref = np.vstack([s.X for s in self.sources])
        if ref.shape[0] > 512:
            ref = ref[np.random.default_rng(0).choice(ref.shape[0], 512, replace=False)]
        Qref = np.column_stack([_nearest_quantiles(space, s, ref) for s in self.sources])
        R = np.apply_along_axis(rankdata, 0, Qref)
        R = R - R.mean(axis=0)
        norm = np.sqrt((R**2).sum(axis=0))
        norm[norm == 0] = np.inf
        self._rank_corr = (R.T @ R) / np.outer(norm, norm)
        self._apply_weights()

    def _apply_weights(self, keep_strength: bool = False) -> None:
        """The parts that follow the source weights: kernel density, agreement,
        strength (kept as built when re-weighting: observations that single out
        a few sources confirm the prior, they should not weaken it; the
        search's guard handles disagreement)."""
        w = self.weights[self._owner] * self._quality
        if w.sum() <= 0:
            w = self._quality
        w = w / w.sum()
        factor = BANDWIDTH_FACTOR * (1.0 / float(np.sum(w**2))) ** (-1.0 / (self.space.dim + 4))
        self.kde = MixedKDE(self.space, self._centres, weights=w, bandwidth=factor)
        self.agreement = self._agreement()
        self.ess = 1.0 / float(np.sum(self.weights**2))
        if not keep_strength:
            self.strength = float(min(MAX_STRENGTH, self.ess * max(self.agreement, 0.0)))

    def _agreement(self) -> float:
        """Weighted mean Spearman correlation between sources' predicted quantiles."""
        if len(self.sources) < 2:
            return 1.0
        W = np.outer(self.weights, self.weights)
        np.fill_diagonal(W, 0.0)
        if W.sum() <= 0:
            return 1.0
        return float((W * self._rank_corr).sum() / W.sum())

    # -- the protocol the search uses ---------------------------------------
    def sample_unit(self, n: int, rng: Any = None) -> np.ndarray:
        """n draws from the prior, encoded rows of the space (valid points)."""
        return self.space.snap(self.kde.sample(n, rng))

    def logpdf_unit(self, X: np.ndarray) -> np.ndarray:
        """Log density of encoded rows."""
        return self.kde.logpdf(X)

    def sample(self, n: int, rng: Any = None) -> list[dict]:
        """n configs drawn from the prior."""
        return self.space.decode(self.sample_unit(n, rng))

    def logpdf(self, configs: Sequence[Mapping]) -> np.ndarray:
        """Log density of configs (validated against the space)."""
        configs = [self.space.normalize(c) for c in configs]
        return self.logpdf_unit(self.space.encode(configs))

    @property
    def candidates(self) -> np.ndarray:
        """Encoded rows of the candidate seeds: the distinct top configs of
        every source, shape (m, d)."""
        return self._candidates

    @property
    def candidate_quantiles(self) -> np.ndarray:
        """The quantile each source predicts for each candidate (that of its
        nearest recorded config), shape (m, n_sources)."""
        return self._Q

    def seed_scores(self) -> np.ndarray:
        """Weighted mean quantile of every candidate seed across sources."""
        return self._Q @ self.weights

    @property
    def seeds(self) -> list[dict]:
        """Configs to try first: the candidates with the best weighted mean
        quantile across sources, best first (valid configs: parameters the
        sources did not have are drawn uniformly)."""
        order = np.argsort(-self.seed_scores(), kind="stable")[: self.n_seeds]
        rng = np.random.default_rng(0)  # parameters no source knew are drawn uniformly, reproducibly
        return [self.space.complete(c, rng) for c in self.space.decode(self._candidates[order])]

    def reweight(self, X: np.ndarray, y: np.ndarray, maximize: bool = True) -> "Prior":
        """A prior whose sources are re-weighted by agreement with observations.

        Each source predicts a quantile for every observed config (that of its
        nearest recorded config); a source gains weight
        ``((1 - e) / e) ** ((concordant - discordant) / (n - 1))`` with
        ``e = PAIR_ERROR``: the exponent is Kendall's statistic scaled to grow
        linearly, not quadratically, with the number of observations.
        """
        X = np.atleast_2d(np.asarray(X, dtype=float))
        y = np.asarray(y, dtype=float)
        ok = np.isfinite(y)
        X, y = X[ok], y[ok]
        if len(y) < 2:
            return self
        y = y if maximize else -y
        lam = math.log((1 - PAIR_ERROR) / PAIR_ERROR)
        base = np.array([s.similarity for s in self.sources], dtype=float)
        base = base / base.sum()
        logw = np.log(np.maximum(base, 1e-300))
        for i, s in enumerate(self.sources):
            pred = _nearest_quantiles(self.space, s, X)
            logw[i] += lam * _concordance(pred, y) / (len(y) - 1)
        w = np.exp(logw - logw.max())
        new = Prior.__new__(Prior)
        new.__dict__.update(self.__dict__)
        new.weights = w / w.sum()
        new.info = dict(self.info, reweighted_on=int(len(y)))
        new._apply_weights(keep_strength=True)
        return new

    # -- reading -------------------------------------------------------------
    @property
    def provenance(self) -> dict:
        """Which studies and trials the prior came from, with which weights and why."""
        neighbors = []
        for s, w in zip(self.sources, self.weights):
            neighbors.append({
                "study_id": int(s.study_id), "task_id": int(s.task_id), "task": s.task,
                "distance": None if not math.isfinite(s.distance) else float(s.distance),
                "similarity": float(s.similarity), "weight": float(w), "trial_count": int(s.X.shape[0]),
                **{k: list(v) for k, v in s.notes.items()},
            })
        neighbors.sort(key=lambda r: -r["weight"])
        centres = [
            {"study_id": int(self.sources[i].study_id), "number": int(self.sources[i].numbers[j]),
             "quantile": float(self.sources[i].quantile[j]), "weight": float(w)}
            for (i, j), w in zip(self._centre_origin, self.kde.weights)
        ]
        centres.sort(key=lambda r: -r["weight"])
        return {
            **self.info,
            "space_hash": self.space.content_hash,
            "n_studies": len(self.sources),
            "effective_studies": self.ess,
            "agreement": self.agreement,
            "strength": self.strength,
            "top_fraction": self.top_fraction,
            "neighbors": neighbors,
            "centres": centres,
        }

    def summary(self, n: int = 5, legend: bool = True) -> str:
        """A few readable lines: where the prior comes from and how strong it is.

        The first line carries the figures; with ``legend`` (default) three
        short lines say what effective, agreement and strength n0 mean.
        """
        p = self.provenance
        lines = [
            f"prior over {self.space.dim} parameter(s) from {p['n_studies']} past studies "
            f"(effective {p['effective_studies']:.1f}, agreement {p['agreement']:.2f}, strength n0 = {p['strength']:.1f})",
        ]
        if legend:
            lines += [
                f"  effective: the studies' weights count as much as {p['effective_studies']:.1f} equally weighted "
                "studies",
                "  agreement: how alike those studies rank configs (weighted rank correlation: 1 = the same order, "
                "0 = unrelated)",
                f"  strength n0 = effective x agreement (at most {MAX_STRENGTH:g}): in a density search the prior "
                f"counts as {p['strength']:.1f} trials, its share n0 / (n0 + n) fading as n trials are recorded",
            ]
        lines.append("heaviest sources:")
        for r in p["neighbors"][:n]:
            dist = "" if r["distance"] is None else f", distance {r['distance']:.2f}"
            lines.append(f"  study {r['study_id']} on {r['task']!r}: weight {r['weight']:.3f}{dist}")
        seeds = self.seeds[:3]
        if seeds:
            lines.append("first configs to try:")
            lines.extend(f"  {json.dumps(c)}" for c in seeds)
        return "\n".join(lines)

    def __repr__(self) -> str:
        return (f"Prior({len(self.sources)} studies, strength={self.strength:.2f}, "
                f"agreement={self.agreement:.2f}, space={self.space.dim} params)")

    def recipe(self) -> dict:
        """What rebuilds this prior exactly from the archive it came from.

        Per source, in order: its study and task, how many successful trials
        it used (the first ones by trial number), its similarity and distance,
        and :attr:`Source.digest` to check that the trials read back are the
        same; plus the options. A few hundred bytes per source, against the
        whole recorded history that :meth:`to_dict` carries.
        """
        return {
            "format": RECIPE_FORMAT,
            "space_hash": self.space.content_hash,
            "top_fraction": self.top_fraction,
            "n_seeds": self.n_seeds,
            "info": dict(self.info),
            "sources": [
                {"study_id": int(s.study_id), "task_id": int(s.task_id), "task": s.task,
                 "trial_count": int(s.X.shape[0]), "similarity": float(s.similarity),
                 "distance": None if not math.isfinite(s.distance) else float(s.distance), "digest": s.digest}
                for s in self.sources
            ],
        }

    # -- JSON ------------------------------------------------------------------
    def to_dict(self) -> dict:
        """Plain-data form; :meth:`from_dict` rebuilds an identical prior."""

        def arr(a: np.ndarray) -> list:
            return [[None if isinstance(v, float) and math.isnan(v) else v for v in row] for row in a.tolist()]

        return {
            "format": "warmstart-prior/1",
            "space": self.space.to_dict(),
            "top_fraction": self.top_fraction,
            "n_seeds": self.n_seeds,
            "info": self.info,
            "weights": self.weights.tolist(),
            "provenance": self.provenance,
            "sources": [
                {"study_id": int(s.study_id), "task_id": int(s.task_id), "task": s.task, "X": arr(s.X),
                 "quantile": s.quantile.tolist(), "numbers": np.asarray(s.numbers).astype(int).tolist(),
                 "clipped": np.asarray(s.clipped).astype(bool).tolist(), "similarity": float(s.similarity),
                 "distance": None if not math.isfinite(s.distance) else float(s.distance),
                 "notes": {k: list(v) for k, v in s.notes.items()}}
                for s in self.sources
            ],
        }

    def to_json(self) -> str:
        """JSON text of :meth:`to_dict`."""
        return json.dumps(self.to_dict())

    @classmethod
    def from_dict(cls, d: Mapping, where: str = "prior") -> "Prior":
        """Rebuild a prior from :meth:`to_dict` output."""
        if not isinstance(d, Mapping) or d.get("format") != "warmstart-prior/1":
            raise PriorError(f"{where}: not a warmstart prior (expected format 'warmstart-prior/1')")
        space = Space.from_dict(d["space"], where=f"{where}: space")
        sources = []
        for s in d["sources"]:
            X = np.array([[np.nan if v is None else v for v in row] for row in s["X"]], dtype=float)
            X = X.reshape(-1, space.dim)
            sources.append(Source(
                study_id=s["study_id"], task_id=s["task_id"], task=s["task"], X=X,
                quantile=np.array(s["quantile"], dtype=float), numbers=np.array(s["numbers"], dtype=int),
                clipped=np.array(s["clipped"], dtype=bool), similarity=s["similarity"],
                distance=float("nan") if s["distance"] is None else s["distance"], notes=s.get("notes", {}),
            ))
        return cls(space, sources, np.array(d["weights"], dtype=float), top_fraction=d["top_fraction"],
                   provenance=d.get("info"), n_seeds=d.get("n_seeds", 10))

    @classmethod
    def from_json(cls, text: str, where: str = "prior") -> "Prior":
        """Rebuild a prior from :meth:`to_json` text."""
        try:
            d = json.loads(text)
        except json.JSONDecodeError as exc:
            raise PriorError(f"{where}: not valid JSON ({exc})") from None
        return cls.from_dict(d, where=where)

    def save(self, path: str) -> None:
        """Write the prior as JSON, into a directory that exists."""
        from pathlib import Path

        if not Path(path).absolute().parent.is_dir():  # never a chain of new folders
            raise PriorError(f"{path}: the directory {Path(path).absolute().parent} does not exist; create it "
                             "first, or give a file in an existing directory")
        try:
            with open(path, "w", encoding="utf-8") as fh:
                fh.write(self.to_json())
        except OSError as exc:
            raise PriorError(f"{path}: cannot write the prior ({exc.strerror})") from None

    @classmethod
    def load(cls, path: str) -> "Prior":
        """Read a prior written by :meth:`save`."""
        try:
            with open(path, encoding="utf-8") as fh:
                text = fh.read()
        except OSError as exc:
            raise PriorError(f"{path}: cannot read prior file ({exc.strerror})") from None
        return cls.from_json(text, where=str(path))


def prior_from_sources(
    space: Space,
    sources: list[Source],
    top_fraction: float = 0.2,
    provenance: Mapping | None = None,
    n_seeds: int = 10,
) -> Prior:
    """Build a :class:`Prior` from sources whose ``similarity`` is set."""
    sources = [s for s in sources if s.X.shape[0] > 0]
    if not sources:
        raise PriorError("none of the past studies has a successful trial to learn from")
    sim = np.array([max(float(s.similarity), 0.0) for s in sources])
    if not np.isfinite(sim).all() or sim.sum() <= 0:
        sim = np.ones(len(sources))
    return Prior(space, sources, sim / sim.sum(), top_fraction=top_fraction, provenance=provenance, n_seeds=n_seeds)
