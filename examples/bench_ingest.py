"""Benchmark: bulk ingest of past trials from Parquet against a row-by-row baseline.

The scenario is invented: a fictional retailer's team tuned gradient-boosted
trees for weekly demand forecasts and kept every trial. We write 1,000,000
trials of a realistic space (three reals, two of them on a log scale, two
integers, one of them on a log scale, a choice and a parameter active for one
level only) to Parquet, then time

* bulk:      ``read_table(file)`` + ``Archive.add_trials`` (one transaction;
             validation vectorised in pandas, JSON and content keys built in
             DuckDB SQL over a registered DataFrame);
* row by row: a 20,000-row sample read from Parquet, each row validated,
             given its canonical JSON and SHA-256 content key in Python, then
             ``executemany`` into the same ``trials`` table (one transaction).

Both land in the same archive file. The goal in the foundation issue is at
least 300,000 trials/s and at least 50 times the row-by-row rate. The machine
may be shared: the script prints the CPU time of this process and the load
average beside the wall-clock figures, so the two can be told apart.

Run::

    python examples/bench_ingest.py              # 1,000,000 trials
    python examples/bench_ingest.py --trials 200000 --sample 5000
"""

from __future__ import annotations

import argparse
import hashlib
import json
import os
import shutil
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

from warmstart.archive import Archive
from warmstart.archive.ingest import prepare_trials
from warmstart.space import Space
from warmstart.data.read import read_table

SPACE = Space.from_dict({"params": {
    "learning_rate": {"type": "real", "low": 1e-3, "high": 0.5, "log": True},
    "subsample": {"type": "real", "low": 0.5, "high": 1.0},
    "reg_lambda": {"type": "real", "low": 1e-4, "high": 10.0, "log": True},
    "max_depth": {"type": "integer", "low": 2, "high": 12},
    "n_estimators": {"type": "integer", "low": 10, "high": 2000, "log": True},
    "booster": {"type": "choice", "choices": ["tree", "dart", "linear"]},
    "drop_rate": {"type": "real", "low": 0.0, "high": 0.5, "when": {"booster": ["dart"]}},
}})


def make_trials(n: int, seed: int = 0) -> pd.DataFrame:
    """n uniform configs of SPACE as columns, an invented score, 2 % failed (NaN score)."""
    rng = np.random.default_rng(seed)
    X = SPACE.sample_unit(n, rng)
    columns = {}
    for j, p in enumerate(SPACE.params):
        if p.kind == "choice":
            columns[p.name] = np.asarray(p.choices, dtype=object)[np.nan_to_num(X[:, j]).astype(int)]
        else:
            values = p.from_unit(np.nan_to_num(X[:, j]))
            columns[p.name] = values.astype(np.int64) if p.kind == "integer" else np.where(np.isnan(X[:, j]), np.nan, values)
    frame = pd.DataFrame(columns)
    frame["booster"] = frame["booster"].astype("str")
    score = 0.8 - 0.1 * np.abs(np.log10(frame["learning_rate"]) + 1.3) + 0.02 * rng.normal(size=n)
    frame["score"] = np.where(rng.random(n) < 0.02, np.nan, score)
    frame["cost_s"] = rng.gamma(2.0, 30.0, size=n)
    return frame


def python_row(space: Space, row: dict, fp: str, learner: str, study: int, number: int) -> tuple:
    """Row-by-row baseline: validate, canonical JSON and content key in Python."""
    config = {name: row[name] for name in space.names if name in row and not _missing(row[name])}
    config = space.align(config).config  # drops values of inactive parameters, as ingest does
    text = space.canonical_json(config)
    score = row["score"]
    ok = score is not None and np.isfinite(score)
    key = hashlib.sha256(f"{fp}|{learner}|{text}".encode()).hexdigest()
    return (study, number, text, float(score) if ok else None, "ok" if ok else "failed", row.get("cost_s"),
            None, None, None if ok else "score is missing or not finite", key)


def _missing(value) -> bool:
    return value is None or (isinstance(value, float) and np.isnan(value))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--trials", type=int, default=1_000_000, help="trials in the bulk file (default 1,000,000)")
    parser.add_argument("--sample", type=int, default=20_000, help="rows of the row-by-row baseline (default 20,000)")
    parser.add_argument("--workdir", type=Path, help="where to write the files (default: a temporary folder)")
    args = parser.parse_args()
    workdir = args.workdir or Path(tempfile.mkdtemp(prefix="warmstart-bench-"))
    workdir.mkdir(parents=True, exist_ok=True)
    bulk_file, sample_file, archive_file = workdir / "trials.parquet", workdir / "sample.parquet", workdir / "bench.duckdb"
    for path in (bulk_file, sample_file, archive_file):
        path.unlink(missing_ok=True)

    print(f"writing {args.trials:,} invented trials to {bulk_file} ...", flush=True)
    trials = make_trials(args.trials)
    trials.to_parquet(bulk_file, index=False)
    trials.sample(n=min(args.sample, len(trials)), random_state=1).to_parquet(sample_file, index=False)
    del trials

    rng = np.random.default_rng(3)
    data = pd.DataFrame({"week": np.arange(200), "price": rng.normal(10, 2, 200), "promo": rng.integers(0, 2, 200)})
    data["demand"] = 50 - 2 * data["price"] + 8 * data["promo"] + rng.normal(0, 3, 200)
    archive = Archive(archive_file)
    task = archive.add_task("demand-weekly (invented)", data, target="demand")
    bulk_study = archive.add_study(task, "gbt", SPACE, metric="r2")
    row_study = archive.add_study(task, "gbt", SPACE, metric="r2")
    fp = archive.tasks()["fingerprint"].iloc[0]

    # -- bulk path (public API, as `warmstart ingest` uses it) ------------------
    load0 = os.getloadavg()[0]
    wall, cpu = time.perf_counter(), time.process_time()
    frame = read_table(bulk_file)
    t_read = time.perf_counter() - wall
    n_bulk = archive.add_trials(bulk_study, frame, where=str(bulk_file))
    bulk_wall, bulk_cpu = time.perf_counter() - wall, time.process_time() - cpu
    # where the time goes: validation alone, timed again on the same frame
    t0 = time.perf_counter()
    prepare_trials(SPACE, frame, where=str(bulk_file))
    t_prepare = time.perf_counter() - t0
    del frame

    # -- row-by-row baseline ------------------------------------------------------
    wall, cpu = time.perf_counter(), time.process_time()
    sample = read_table(sample_file)
    rows = [python_row(SPACE, r, fp, "gbt", row_study, i + 1) for i, r in enumerate(sample.to_dict(orient="records"))]
    with archive.transaction() as con:
        con.executemany("INSERT INTO trials (study_id, number, config, score, status, cost_s, started_at, "
                        "finished_at, error, content_key) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?)", rows)
    row_wall, row_cpu = time.perf_counter() - wall, time.process_time() - cpu
    load1 = os.getloadavg()[0]

    # -- checks: every trial is there; both paths store the same configs -------------------
    counts = dict(archive.con.execute("SELECT study_id, count(*) FROM trials GROUP BY study_id").fetchall())
    assert counts == {bulk_study: n_bulk, row_study: len(rows)}, counts
    bulk_configs = archive.con.execute(
        "SELECT config FROM trials WHERE study_id = ? AND number <= 1000 ORDER BY number", [bulk_study]
    ).fetchall()
    check = pd.read_parquet(bulk_file).head(1000).to_dict(orient="records")
    for (text,), row in zip(bulk_configs, check):
        assert json.loads(text) == json.loads(python_row(SPACE, row, fp, "gbt", 0, 0)[2])
    archive.close()

    bulk_rate, row_rate = n_bulk / bulk_wall, len(rows) / row_wall
    print(f"load average (1 min) {load0:.1f} before, {load1:.1f} after; CPUs {os.cpu_count()}")
    print(f"bulk:       {n_bulk:>9,} trials in {bulk_wall:6.2f} s wall ({bulk_cpu:6.2f} s CPU) = {bulk_rate:>10,.0f} trials/s"
          f"  [read {t_read:.2f} s, validate {t_prepare:.2f} s, insert ~{bulk_wall - t_read - t_prepare:.2f} s]")
    print(f"row by row: {len(rows):>9,} trials in {row_wall:6.2f} s wall ({row_cpu:6.2f} s CPU) = {row_rate:>10,.0f} trials/s")
    print(f"ratio bulk / row-by-row: {bulk_rate / row_rate:,.0f}x (wall), "
          f"{(n_bulk / bulk_cpu) / (len(rows) / row_cpu):,.0f}x (CPU)")
    print(f"goal: >= 300,000 trials/s -> {'met' if bulk_rate >= 300_000 else 'MISSED'}; "
          f">= 50x -> {'met' if bulk_rate / row_rate >= 50 else 'MISSED'}")
    if args.workdir:
        print(f"files kept in {workdir}")
    else:
        shutil.rmtree(workdir, ignore_errors=True)


if __name__ == "__main__":
    main()
