"""Benchmark: profiling a big table, and neighbor queries over a big archive.

Goals: a profile of 1,000,000 x 50 mixed-type rows in < 10 s; neighbors over
an archive of 100,000 tasks in < 100 ms per query. Baselines are measured in
the same run: pandas moments and correlations over every row (what the
statistical group would cost without subsampling), and a naive per-row Python
distance loop over the archived profiles.

The data is invented: a fictional parcel-delivery company ("Larkspur
Logistics") with one late-delivery table per depot and month. Nothing here
describes a real organisation.

Run: ``python examples/bench_profile.py [--rows 1000000] [--tasks 100000]``
"""

from __future__ import annotations

import argparse
import json
import math
import statistics
import tempfile
import time
from datetime import datetime
from pathlib import Path

import numpy as np
import pandas as pd

from warmstart.archive import Archive
from warmstart.archive.queries import defaults, neighbors, profile_index
from warmstart.profile import profile
from warmstart.similarity import HEAVY_TAILED
from warmstart.space import Space


def delivery_table(n: int, seed: int = 0) -> pd.DataFrame:
    """n rows x 50 features (35 numeric with missing values, 10 string, 5
    integer) plus a three-class target ``late``."""
    rng = np.random.default_rng(seed)
    cols: dict[str, object] = {}
    for j in range(35):
        x = rng.gamma(1.0 + j % 4, 2.0, n) if j % 3 else rng.normal(0, 1 + j, n)
        if j % 5 == 0:
            x[rng.random(n) < 0.08] = np.nan
        cols[f"sensor_{j}"] = x
    for j in range(10):
        levels = np.array([f"zone_{i}" for i in range(3 + 40 * j)])
        cols[f"zone_code_{j}"] = pd.Series(levels[rng.integers(0, levels.size, n)], dtype="str")
    for j in range(5):
        cols[f"parcels_{j}"] = rng.poisson(3 + j, n)
    score = cols["sensor_1"] - cols["sensor_4"] + 0.3 * cols["parcels_0"] + rng.normal(0, 2, n)
    cols["late"] = np.where(score > 4, "very_late", np.where(score > 0, "late", "on_time"))
    return pd.DataFrame(cols)


def bench_profile(rows: int) -> None:
    frame = delivery_table(rows)
    print(f"profile of {rows:,} x {frame.shape[1] - 1} mixed-type rows (35 float with NaN, 10 string, 5 integer)")
    profile(frame.iloc[:2000], "late")  # import scikit-learn once, outside the timing
    stamps: list[tuple[str, float]] = []
    start = time.perf_counter()
    prof = profile(frame, "late", progress=lambda group: stamps.append((group, time.perf_counter())))
    total = time.perf_counter() - start
    marks = stamps + [("end", start + total)]
    groups = ", ".join(f"{g} {b - a:.2f} s" for (g, a), (_, b) in zip(marks[:-1], marks[1:]))
    print(f"  warmstart.profile: {total:.2f} s  ({len(prof)} meta-features; {groups})  goal < 10 s")
    numeric = frame.select_dtypes("number")
    start = time.perf_counter()
    numeric.skew(), numeric.kurt(), numeric.corr()
    base = time.perf_counter() - start
    print(f"  baseline, pandas skew + kurtosis + correlation over all rows: {base:.2f} s "
          f"(the statistical group alone, unsampled: {base / total:.1f}x the whole profile)")


SPACE = Space.from_dict({"params": {"C": {"type": "real", "low": 1e-3, "high": 1e3, "log": True}}})


def build_archive(path: str, n_tasks: int, seed: int = 1) -> dict:
    """An archive of n_tasks invented depot-month tasks: real profiles of a
    few small tables, jittered, one svm study of 5 trials each."""
    rng = np.random.default_rng(seed)
    bases = []
    for s in range(8):
        small = delivery_table(400 + 300 * s, seed=100 + s)
        bases.append(profile(small.iloc[:, [*range(0, 10 + 5 * s), 50]], "late", seed=s))
    features = list(bases[0])
    base = np.array([[b[f] for f in features] for b in bases])
    X = base[rng.integers(0, len(bases), n_tasks)] * (1 + rng.normal(0, 0.05, (n_tasks, len(features))))
    ids = np.arange(1, n_tasks + 1)
    now = datetime(2026, 1, 1)
    with Archive(path) as a:
        first = a.add_task("depot-0000", delivery_table(200, seed=7), "late")  # via the API: schema, space ids
        study = a.add_study(first, "svm", SPACE, metric="balanced_accuracy")
        a.add_trials(study, pd.DataFrame({"C": [0.1, 1.0], "score": [0.7, 0.8]}))
        space_id = a.con.execute("SELECT space_id FROM studies WHERE study_id = ?", [study]).fetchall()[0][0]
        rest = ids[ids > first]
        tasks = pd.DataFrame({
            "task_id": rest, "name": [f"depot-{i:06d}" for i in rest], "fingerprint": [f"fp{i}" for i in rest],
            "kind": "classification", "target": "late", "n_rows": 1000, "n_features": 50, "created_at": now,
            "source": "bench",
        })
        long = pd.DataFrame({
            "task_id": np.repeat(rest, len(features)), "feature": np.tile(features, rest.size),
            "value": X[rest - 1].ravel(), "version": a.con.execute("SELECT min(version) FROM profiles").fetchall()[0][0],
        })
        studies = pd.DataFrame({
            "study_id": rest + 1, "task_id": rest, "learner": np.where(rest % 10 == 0, "gbt", "svm"),
            "space_id": space_id, "metric": "balanced_accuracy", "direction": "maximize", "origin": "imported",
            "prior": None, "created_at": now, "finished_at": now, "owner": None, "tags": "{}",
            "source_archive": None, "merged_at": None,
        })
        grid = np.array([0.01, 0.1, 1.0, 10.0, 100.0])
        trial_count = 5
        trials = pd.DataFrame({
            "study_id": np.repeat(rest + 1, trial_count), "number": np.tile(np.arange(1, trial_count + 1), rest.size),
            "config": np.tile([json.dumps({"C": c}) for c in grid], rest.size),
            "score": rng.random(rest.size * trial_count), "status": "ok", "cost_s": 1.0,
            "started_at": now, "finished_at": now, "error": None,
            "content_key": [f"k{i}" for i in range(rest.size * trial_count)],
        })
        with a.transaction() as con:
            for table, df in (("tasks", tasks), ("profiles", long), ("studies", studies), ("trials", trials)):
                con.register("_bench_rows", df)
                con.execute(f"INSERT INTO {table} SELECT * FROM _bench_rows")
                con.unregister("_bench_rows")
    return {"features": features, "X": X, "base": base}


def naive_neighbors(profiles: list[dict], query: dict, center: dict, scale: dict, k: int) -> list[int]:
    """Baseline: standardise and compare in a per-row Python loop."""
    dist = []
    for i, row in enumerate(profiles):
        s = 0.0
        for name, value in query.items():
            f = math.asinh if name in HEAVY_TAILED else float
            a = (f(value) - center[name]) / scale[name]
            b = (f(row[name]) - center[name]) / scale[name]
            s += (a - b) ** 2
        dist.append((math.sqrt(s / len(query)), i))
    return [i for _, i in sorted(dist)[:k]]


def bench_neighbors(n_tasks: int, queries: int = 30) -> None:
    with tempfile.TemporaryDirectory() as tmp:
        path = str(Path(tmp) / "bench.duckdb")
        start = time.perf_counter()
        built = build_archive(path, n_tasks)
        print(f"\nneighbors over an archive of {n_tasks:,} tasks "
              f"({n_tasks * len(built['features']):,} profile rows, {n_tasks * 5:,} trials; built in "
              f"{time.perf_counter() - start:.1f} s)")
        rng = np.random.default_rng(2)
        probes = [dict(zip(built["features"], built["base"][i % len(built["base"])] * (1 + rng.normal(0, 0.05, len(built["features"])))))
                  for i in range(queries)]
        with Archive(path, read_only=True) as a:
            start = time.perf_counter()
            neighbors(a, probes[0], learner="svm", k=5)
            first = time.perf_counter() - start
            times = []
            for prof in probes:
                start = time.perf_counter()
                found = neighbors(a, prof, learner="svm", k=5)
                times.append(time.perf_counter() - start)
            assert len(found) == 5
            index, _ = profile_index(a, "classification")
            start = time.perf_counter()
            d = defaults(a, "svm", n=5)
            t_defaults = time.perf_counter() - start
            start = time.perf_counter()
            defaults(a, "svm", near=probes[0], n=5)
            t_defaults_near = time.perf_counter() - start
        med = statistics.median(times)
        print(f"  first query (loads and standardises all profiles once): {first * 1000:.0f} ms")
        print(f"  warm query, learner filter, k=5: median {med * 1000:.1f} ms, max {max(times) * 1000:.1f} ms "
              f"over {queries} queries  goal < 100 ms")
        # baseline: a per-row Python loop over the same profiles (a few queries)
        rows = [dict(zip(built["features"], r)) for r in built["X"]]
        center = dict(zip(index.features, index.standardizer.center))
        scale = dict(zip(index.features, index.standardizer.scale))
        start = time.perf_counter()
        for prof in probes[:3]:
            slow = naive_neighbors(rows, prof, center, scale, 5)
        naive = (time.perf_counter() - start) / 3
        fast = index.query(probes[2], k=5)["task_id"].tolist()
        same = [int(index.task_ids[i]) for i in slow] == fast
        print(f"  baseline, per-row Python distance loop: {naive * 1000:.0f} ms per query "
              f"(warm query is {naive / med:.0f}x faster; same top 5: {same})")
        print(f"  defaults over {n_tasks * 5:,} trials: {t_defaults * 1000:.0f} ms; weighted by similarity: "
              f"{t_defaults_near * 1000:.0f} ms (top config {d['config'].iloc[0]})")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=1_000_000)
    parser.add_argument("--tasks", type=int, default=100_000)
    args = parser.parse_args()
    bench_profile(args.rows)
    bench_neighbors(args.tasks)


if __name__ == "__main__":
    main()
