"""The built-in demo, set in an invented scenario.

*Larkspur Provisions* is a fictional cooperative of neighbourhood grocery
stores, invented for this demo; every store, number and name here is made
up and generated with a fixed seed. Each store predicts which loyalty
members will lapse next quarter, from a table of its own members. Stores
differ in size, in how tangled the lapse pattern is (compact town stores
versus spread-out rural ones), in how noisy their records are and in how
many unused columns their export carries, so the best model settings differ
from store to store but follow the stores' traits, which is what transfer
from similar stores can exploit.

:func:`run_demo` does the whole job end to end: build a tuning history for
some stores, profile a new store, show its neighbors, build the prior, run
warm and cold searches side by side, print the gain with its interval, and
write an HTML report.
"""

from __future__ import annotations

import time
import zlib
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np
import pandas as pd

from warmstart.archive import Archive
from warmstart.errors import WarmstartError
from warmstart.evaluate.learners import cv_objective, default_space
from warmstart.evaluate.workers import map_jobs
from warmstart.gain.bits import interval_text, queries_text
from warmstart.gain.live import LiveResult, live_gain
from warmstart.gain.replay import ReplayResult, leave_one_task_out
from warmstart.gain.report import write_report
from warmstart.prior import Prior
from warmstart.profile import profile
from warmstart.search.static import FixedListSearch
from warmstart.search.strategy import run_search
from warmstart.space import Space
from warmstart.text import bits_in_words, table_lines

__all__ = ["StoreTraits", "store_traits", "store_table", "demo_space", "run_demo", "ORGANISATION"]

ORGANISATION = "Larkspur Provisions (an invented grocery cooperative)"
#: The metric every demo study is tuned on.
METRIC = "balanced_accuracy"
_TOWNS = [
    "Alderbrook", "Bexley Fen", "Cobble Hill", "Dunmarrow", "Eastwick Lane", "Fallowmere", "Greyhaven",
    "Hollin Cross", "Ivybridge Row", "Juniper Vale", "Kestrel Point", "Larchmont", "Millbeck", "Nettlecombe",
    "Orchard Sands", "Pennyworth", "Quarry Gate", "Rookfield", "Saltmarsh", "Thistledown", "Upper Wyke",
    "Vetch Green", "Willowmere", "Yarrow Ford",
]


@dataclass(frozen=True)
class StoreTraits:
    """Hidden traits of one invented store."""

    name: str
    n_members: int
    tangle: float  # 0 = lapse follows a straight rule, 1 = a tangled one
    noise: float  # share of random noise in the lapse score
    extra_columns: int
    lapse_rate: float


def store_traits(index: int, seed: int = 7) -> StoreTraits:
    """Traits of store ``index`` (fixed by the seed)."""
    rng = np.random.default_rng([seed, index])
    tangle = float(rng.beta(2.0, 4.0))  # most stores follow a fairly straight rule
    return StoreTraits(
        name=f"{_TOWNS[index % len(_TOWNS)]} store" + (f" {index // len(_TOWNS) + 1}" if index >= len(_TOWNS) else ""),
        n_members=int(rng.integers(200, 400)),
        tangle=tangle,
        noise=float(np.clip(0.15 + 0.6 * rng.beta(1.5, 2.5), 0.1, 0.9)),
        extra_columns=int(rng.integers(0, 8)),
        lapse_rate=float(rng.uniform(0.2, 0.45)),
    )


def store_table(traits: StoreTraits, seed: int = 7) -> pd.DataFrame:
    """The member table of one invented store; target column ``lapsed``."""
    rng = np.random.default_rng([seed, zlib.crc32(traits.name.encode()), traits.n_members])
    n = traits.n_members
    t = traits.tangle
    visits = rng.gamma(2.0 + 3 * (1 - t), 1.5, n)
    basket = rng.lognormal(3.2, 0.35 + 0.4 * t, n)
    tenure = rng.uniform(1, 120, n)
    distance = rng.lognormal(0.5 + 1.2 * t, 0.3 + 0.7 * t, n)
    promo = rng.beta(2, 5, n)
    z = np.column_stack([
        (visits - visits.mean()) / visits.std(),
        (np.log(basket) - np.log(basket).mean()) / np.log(basket).std(),
        (tenure - 60) / 35,
        (np.log(distance) - np.log(distance).mean()) / np.log(distance).std(),
        (promo - promo.mean()) / promo.std(),
    ])
    straight = -1.0 * z[:, 0] - 0.5 * z[:, 2] + 0.6 * z[:, 3] + 0.3 * z[:, 4]
    freq = 1.0 + 2.5 * t
    tangled = np.sin(freq * z[:, 0]) * np.cos(freq * z[:, 3]) + np.sin(freq * (z[:, 1] + z[:, 2])) * 0.8
    score = (1 - t) * straight / 1.2 + t * tangled * 1.3
    score = (1 - traits.noise) * score / score.std() + traits.noise * rng.normal(size=n) * 1.2
    lapsed = (score > np.quantile(score, 1 - traits.lapse_rate)).astype(int)
    tier = np.where(visits + rng.normal(0, 1, n) > 5, "gold", np.where(visits > 2.5, "silver", "bronze"))
    frame = pd.DataFrame({
        "visits_per_month": visits.round(2),
        "basket_eur": basket.round(2),
        "tenure_months": tenure.round(0),
        "distance_km": distance.round(2),
        "promo_share": promo.round(3),
        "tier": pd.Series(tier, dtype="str"),
    })
    for j in range(traits.extra_columns):
        frame[f"export_col_{j + 1}"] = rng.normal(size=n).round(3)
    holes = rng.random(n) < 0.03
    frame.loc[holes, "basket_eur"] = np.nan
    frame["lapsed"] = lapsed
    return frame


def demo_space(learner: str = "svm"):
    """The space the demo tunes: the learner's default space, except for
    ``svm``, whose C range stops at 2**10 so no demo config trains for long."""
    space = default_space(learner, "classification")
    if learner != "svm":
        return space
    d = space.to_dict()
    d["params"]["C"] = {"type": "real", "low": 2.0**-5, "high": 2.0**10, "log": True}
    return Space.from_dict(d)


@dataclass(frozen=True, eq=False)
class _HistoryJob:
    """One store's history study: the learner evaluated on a fixed design."""

    frame: pd.DataFrame
    learner: str
    space: Space
    configs: list
    seed: int


def _history_study(job: _HistoryJob) -> pd.DataFrame:
    """Evaluate the design on one store (module level, so worker processes can run it):
    one row per config, with its score (NaN when failed) and cost."""
    objective = cv_objective(job.frame, "lapsed", job.learner, metric=METRIC, cv=3, seed=job.seed)
    result = run_search(FixedListSearch(job.space, job.configs), objective, len(job.configs))
    return pd.DataFrame([{**t.config, "score": s, "cost_s": t.cost_s} for t, s in zip(result.trials, result.scores)])


def run_demo(
    out_dir: str | Path = "demo-out",
    n_history: int = 16,
    n_configs: int = 48,
    budget: int = 10,
    repeats: int = 5,
    workers: int = 2,
    learner: str = "svm",
    echo: Callable[[str], None] = print,
    seed: int = 7,
    progress: Callable[[str], Callable[[int, int], None]] | None = None,
) -> dict:
    """Run the whole job on the invented scenario and write a report.

    Parameters
    ----------
    out_dir : path
        Where the demo archive (``demo.duckdb``) and report (``report.html``)
        go; a previous demo archive there is replaced.
    n_history : int
        Stores whose tuning history is built first.
    n_configs : int
        Configs evaluated per history store (a scrambled Sobol design).
    budget, repeats : int
        Warm and cold searches on the new store: queries each, runs each.
    workers : int
        Processes.
    learner : str
        Built-in learner to tune.
    echo : callable(text), default print
        Where the figures go (the command line passes ``click.echo``).
    seed : int, default 7
        Seed of the invented stores, the design and the searches.
    progress : callable(label) -> callable(done, total), optional
        Makes a progress callback for each long step ("history", "live",
        "replay"); none by default (the command line draws bars on stderr).

    Returns
    -------
    dict
        The figures printed: live gain, replay pooled gain, paths.
    """
    started = time.monotonic()
    bar = progress or (lambda label: None)
    db = _fresh_archive_path(Path(out_dir))
    echo(f"warmstart demo: {ORGANISATION}. Every store and figure in it is invented.")
    echo(f"Each store predicts which loyalty members lapse next quarter; we tune {learner!r} for them.\n")
    space = demo_space(learner)
    stores = [store_traits(i, seed) for i in range(n_history + 1)]
    tables = [store_table(t, seed) for t in stores]
    with Archive(str(db)) as archive:
        _build_history(archive, stores[:n_history], tables[:n_history], space, learner, n_configs, workers, seed,
                       echo, bar("  history"))
        echo(f"   archive: {db} ({n_history} studies, {n_history * n_configs} trials)\n")
        new, new_table = stores[n_history], tables[n_history]
        built = _meet_new_store(archive, new, new_table, space, learner, echo)
        live = _live_step(new, new_table, space, learner, built, budget, repeats, workers, seed, echo, bar("  live"))
        replay = _replay_step(archive, learner, budget, workers, seed, echo, bar("  replay"))
    report = write_report(
        [live, replay], db.parent / "report.html", title="warmstart demo: Larkspur Provisions (invented scenario)",
        notes=[f"{ORGANISATION}: all stores and data are invented and generated with seed {seed}.",
               "A tuned cross-validation score is optimistic: keep an untouched test set for the final check."],
    )
    elapsed = time.monotonic() - started
    echo(f"\nreport: {report}   (demo took {elapsed:.0f}s)")
    return {"live": live.tasks[0].to_dict(), "replay": replay.pooled.to_dict(), "report": str(report),
            "archive": str(db), "seconds": elapsed}


def _fresh_archive_path(out: Path) -> Path:
    """``out/demo.duckdb``, with any previous demo archive (and its WAL) removed;
    ``out`` is created if missing, inside a directory that exists."""
    if not out.absolute().parent.is_dir():
        raise WarmstartError(f"{out}: the directory {out.absolute().parent} does not exist; create it first, "
                             "or give a folder in an existing directory")
    if out.exists() and not out.is_dir():
        raise WarmstartError(f"{out}: is a file; give a folder for the demo's archive and report")
    out.mkdir(exist_ok=True)
    db = out / "demo.duckdb"
    for stale in (db, Path(str(db) + ".wal")):
        if stale.exists():
            stale.unlink()
    return db


def _build_history(archive: Archive, stores: list[StoreTraits], tables: list[pd.DataFrame], space: Space,
                   learner: str, n_configs: int, workers: int, seed: int, echo: Callable[[str], None],
                   progress: Callable[[int, int], None] | None) -> None:
    """Step 1: the same Sobol design evaluated on every history store, ingested as one study each."""
    echo(f"1. Building a tuning history: {n_configs} configs of {learner!r} on each of {len(stores)} stores "
         f"(3-fold cross-validated balanced accuracy)")
    design = space.sobol(n_configs, np.random.default_rng(seed))
    jobs = [_HistoryJob(table, learner, space, design, seed) for table in tables]
    results = map_jobs(_history_study, jobs, workers, progress)
    for store, table, trials in zip(stores, tables, results):
        archive.ingest(trials, task=store.name, data=table, target="lapsed", learner=learner,
                       space=space, metric=METRIC, where=f"demo history of {store.name}",
                       source="warmstart.demo", owner="demo", tags={"scenario": "larkspur"})


def _meet_new_store(archive: Archive, new: StoreTraits, table: pd.DataFrame, space: Space, learner: str,
                    echo: Callable[[str], None]) -> Prior:
    """Steps 2 to 4: the new store's profile, its nearest past stores and the prior they give."""
    echo(f"2. A new store joins: {new.name} ({len(table)} members, {table.shape[1] - 1} columns)")
    prof = profile(table, target="lapsed")
    shown = ["log_rows", "log_features", "class_entropy", "minority_share", "landmark_1nn", "landmark_lda"]
    echo("   profile: " + ", ".join(f"{k} {prof[k]:.3g}" for k in shown if k in prof))
    neigh = archive.neighbors(prof, learner=learner, k=5)
    echo("\n3. Its nearest past stores (profile distance; similarity: the weight a prior gives each store's "
         "study; best: its best score):")
    cols = [c for c in ("task", "distance", "similarity", "best_score") if c in neigh.columns]
    headers = {"task": "store", "best_score": "best"}
    for line in table_lines([headers.get(c, c) for c in cols], list(neigh[cols].itertuples(index=False)), digits=3):
        echo("   " + line)
    built = archive.build_prior(prof, learner=learner, space=space)
    echo("\n4. The prior built from them:")
    echo("\n".join("   " + line for line in built.summary(n=3).splitlines()))
    return built


def _live_step(new: StoreTraits, table: pd.DataFrame, space: Space, learner: str, prior: Prior, budget: int,
               repeats: int, workers: int, seed: int, echo: Callable[[str], None],
               progress: Callable[[int, int], None] | None) -> LiveResult:
    """Step 5: warm and cold searches side by side on the new store."""
    echo(f"\n5. Warm and cold searches side by side on {new.name}: budget {budget}, {repeats} runs each "
         f"(target: top 5% of a 64-config reference sample)")
    objective = cv_objective(table, "lapsed", learner, metric=METRIC, cv=3, seed=seed)
    live = live_gain(space, objective, prior, budget=budget, repeats=repeats, seed=seed, workers=workers,
                     task=new.name, learner=f"{learner} (live, {new.name})", progress=progress)
    t = live.tasks[0]
    echo(f"   ({bits_in_words(live.gamma)})")
    echo(f"   warm: {t.bits_warm:+.2f} bits over uniform, cold: {t.bits_cold:+.2f} bits")
    echo(f"   gain of warm over cold: {t.gain:+.2f} bits ({interval_text(t.gain_low, t.gain_high)}; "
         f"{t.verdict}){' [a search never hit: smoothed]' if t.smoothed else ''}")
    echo(f"   median queries to the first hit: warm {queries_text(t.first_hit_warm)}, "
         f"cold {queries_text(t.first_hit_cold)}")
    return live


def _replay_step(archive: Archive, learner: str, budget: int, workers: int, seed: int,
                 echo: Callable[[str], None], progress: Callable[[int, int], None] | None) -> ReplayResult:
    """Step 6: leave-one-store-out replay over the whole history."""
    echo(f"\n6. Does transfer help across the whole history? Leave-one-store-out replay, budget {budget}:")
    replay = leave_one_task_out(archive, learner, budget=budget, repeats=10, seed=seed, workers=workers,
                                progress=progress)
    pg = replay.pooled
    echo(f"   pooled over {pg.n_tasks} stores: warm {pg.bits_warm:+.2f} bits, cold {pg.bits_cold:+.2f} bits; "
         f"gain {pg.gain:+.2f} bits (95% {pg.gain_low:+.2f} to {pg.gain_high:+.2f}), "
         f"transfer hurt on {pg.share_hurt:.0%} of stores")
    return replay
