"""Benchmark: merge two archives of 1,000,000 trials each, half of them shared.

Goal (issue 7): under 30 s and under 2 GB peak memory on 2 cores.

The scenario is invented: a team of two retunes an SVM and a gradient-boosted
model for 50 fictional stores; each teammate's archive holds 400 studies of
2,500 trials, and 200 of those studies (the same trials, recorded by both)
appear in both archives. Task profiles are placeholders (a single number per
task): the benchmark measures curation, not profiling.

What is measured, all in this run:

- ``warmstart curate merge`` as a real child process on the full archives:
  wall time, and peak resident memory from ``os.wait4`` (``ru_maxrss`` of that
  child: DuckDB allocates outside Python, so tracemalloc would not see it);
- the same merge run again (nothing new; it must add nothing);
- a naive per-study Python merge (read each study's trials, drop the known
  content keys in Python, add the rest study by study) and the bulk merge, on
  a 20,000-trial sample of each archive: trials per second and their ratio.

Run ``python examples/bench_curate.py`` (``--trials`` to scale down); it
prints figures and writes a bar chart (PNG); it asserts nothing.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

from warmstart.archive import Archive
from warmstart.space import Space

SPACES = {
    "svm": Space.from_dict({"params": {
        "C": {"type": "real", "low": 1e-3, "high": 1e3, "log": True},
        "gamma": {"type": "real", "low": 1e-4, "high": 10.0, "log": True},
        "kernel": {"type": "choice", "choices": ["rbf", "poly", "linear"]},
        "degree": {"type": "integer", "low": 2, "high": 5, "when": {"kernel": ["poly"]}},
    }}),
    "gbt": Space.from_dict({"params": {
        "learning_rate": {"type": "real", "low": 0.01, "high": 1.0, "log": True},
        "n_estimators": {"type": "integer", "low": 10, "high": 1000, "log": True},
        "max_depth": {"type": "integer", "low": 1, "high": 10},
        "subsample": {"type": "real", "low": 0.5, "high": 1.0},
    }}),
}
N_TASKS = 50


def study_trials(study: int, n: int) -> tuple[str, pd.DataFrame]:
    """The trials of invented study number ``study`` (the same in both archives)."""
    rng = np.random.default_rng(study)
    learner = "svm" if study % 2 else "gbt"
    if learner == "svm":
        kernel = rng.choice(["rbf", "poly", "linear"], n)
        frame = pd.DataFrame({
            "C": np.exp(rng.uniform(np.log(1e-3), np.log(1e3), n)),
            "gamma": np.exp(rng.uniform(np.log(1e-4), np.log(10.0), n)),
            "kernel": kernel,
            "degree": pd.Series(rng.integers(2, 6, n), dtype="Int64").where(kernel == "poly"),
        })
    else:
        frame = pd.DataFrame({
            "learning_rate": np.exp(rng.uniform(np.log(0.01), 0.0, n)),
            "n_estimators": rng.integers(10, 1001, n),
            "max_depth": rng.integers(1, 11, n),
            "subsample": rng.uniform(0.5, 1.0, n),
        })
    frame["score"] = rng.random(n)
    frame["cost_s"] = rng.exponential(3.0, n)
    failed = rng.random(n) < 0.03
    frame.loc[failed, "score"] = np.nan
    return learner, frame


def task_data(task: int) -> pd.DataFrame:
    rng = np.random.default_rng(10_000 + task)
    return pd.DataFrame({"sales": rng.normal(size=50), "visits": rng.poisson(5, 50), "y": rng.integers(0, 2, 50)})


def build(path: Path, first: int, last: int, per_study: int) -> None:
    """Archive with studies ``first .. last-1`` of ``per_study`` trials each."""
    with Archive(path) as archive:
        tasks: dict[int, int] = {}
        for study in range(first, last):
            task = study % N_TASKS
            if task not in tasks:
                tasks[task] = archive.add_task(f"store {task:02d}", task_data(task), "y",
                                               profile={"placeholder": float(task)})
            learner, frame = study_trials(study, per_study)
            sid = archive.add_study(tasks[task], learner, SPACES[learner], metric="roc_auc",
                                    owner=f"analyst {study % 3}")
            archive.add_trials(sid, frame)


def build_pair(folder: Path, trial_count: int, per_study: int) -> tuple[Path, Path]:
    """Two archives of trial_count each, half shared, built side by side in two processes."""
    n = trial_count // per_study
    a, b = folder / "a.duckdb", folder / "b.duckdb"
    jobs = [subprocess.Popen([sys.executable, __file__, "--build", str(p), str(lo), str(lo + n), str(per_study)])
            for p, lo in ((a, 0), (b, n // 2))]
    for job in jobs:
        if job.wait() != 0:
            raise SystemExit("building the archives failed")
    return a, b


def run_child(args: list[str]) -> tuple[float, float, str]:
    """Run a child process; return (wall seconds, peak RSS in MB, stdout)."""
    t0 = time.perf_counter()
    proc = subprocess.Popen(args, stdout=subprocess.PIPE, text=True)
    _, status, usage = os.wait4(proc.pid, 0)
    wall = time.perf_counter() - t0
    out = proc.stdout.read()
    proc.stdout.close()
    proc.returncode = os.waitstatus_to_exitcode(status)
    if proc.returncode != 0:
        raise SystemExit(f"{' '.join(args)} failed with exit code {proc.returncode}")
    return wall, usage.ru_maxrss / 1024.0, out  # ru_maxrss is in KiB on Linux


def cli_merge(archive: Path, other: Path) -> tuple[float, float, dict]:
    wall, rss, out = run_child([sys.executable, "-c", "from warmstart.cli import main; main()",
                                "--archive", str(archive), "curate", "merge", str(other), "--json"])
    return wall, rss, json.loads(out)


def naive_merge(archive: Archive, other_path: Path) -> int:
    """Per-study Python merge: the obvious loop a script would write."""
    added = 0
    with Archive(other_path, read_only=True) as other:
        known = set(archive.con.execute("SELECT content_key FROM trials").df()["content_key"])
        tasks = other.tasks().set_index("task_id")
        for row in other.studies().itertuples():
            trials = other.trials(row.study_id)
            new = trials[~trials["content_key"].isin(known)]
            if new.empty:
                continue
            space = other.space(row.space_id)
            task = tasks.loc[row.task_id]
            here = archive.con.execute("SELECT task_id FROM tasks WHERE fingerprint = ?", [task["fingerprint"]]).fetchall()
            if here:
                task_id = here[0][0]
            else:  # copy the task row and its profile, one statement per row
                task_id = archive.con.execute("SELECT nextval('task_ids')").fetchall()[0][0]
                archive.con.execute("INSERT INTO tasks VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
                                    [task_id, task["name"], task["fingerprint"], task["kind"], task["target"],
                                     int(task["n_rows"]), int(task["n_features"]), task["created_at"], task["source"]])
                for feature, value, version in other.con.execute(
                        "SELECT feature, value, version FROM profiles WHERE task_id = ?", [int(row.task_id)]).fetchall():
                    archive.con.execute("INSERT INTO profiles VALUES (?, ?, ?, ?)", [task_id, feature, value, version])
            sid = archive.add_study(task_id, row.learner, space, metric=row.metric)
            frame = pd.DataFrame(list(new["config"]))
            frame["score"] = new["score"].to_numpy()
            frame["cost_s"] = new["cost_s"].to_numpy()
            archive.add_trials(sid, frame)
            known.update(new["content_key"])
            added += len(new)
    return added


def plot(figures: dict, path: Path) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(7.5, 3.2))
    names = list(figures)
    values = [figures[k] for k in names]
    ax.barh(names, values, color=["#999999", "#3a7bd5", "#1f4e9c"][: len(names)])
    for y, v in enumerate(values):
        ax.text(v, y, f" {v:,.0f}", va="center")
    ax.set_xscale("log")
    ax.set_xlim(min(values) / 2, max(values) * 4)
    ax.set_xlabel("source trials merged per second (log scale)")
    ax.set_title("curate merge: bulk SQL vs a per-study Python loop")
    fig.tight_layout()
    fig.savefig(path, dpi=120)
    plt.close(fig)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--trials", type=int, default=1_000_000, help="trials in each archive")
    parser.add_argument("--per-study", type=int, default=2_500)
    parser.add_argument("--sample", type=int, default=20_000, help="trials per archive for the naive baseline")
    parser.add_argument("--out", type=Path, default=None, help="folder for the plot (default: a temporary folder)")
    parser.add_argument("--build", nargs=4, metavar=("PATH", "FIRST", "LAST", "PER"), help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.build:
        path, first, last, per = args.build
        build(Path(path), int(first), int(last), int(per))
        return
    work = Path(tempfile.mkdtemp(prefix="bench_curate_"))
    out = args.out or work
    out.mkdir(parents=True, exist_ok=True)
    try:
        print(f"building two archives of {args.trials:,} trials each (half shared) ...", flush=True)
        t0 = time.perf_counter()
        a, b = build_pair(work, args.trials, args.per_study)
        print(f"  built in {time.perf_counter() - t0:.1f} s; files {a.stat().st_size / 2**20:.0f} MB and "
              f"{b.stat().st_size / 2**20:.0f} MB")

        wall, rss, summary = cli_merge(a, b)
        print(f"\nmerge {args.trials:,} + {args.trials:,} trials (`warmstart curate merge`, one child process):")
        print(f"  {summary['trials_new']:,} trials new, {summary['trials_already_here']:,} already here; "
              f"{summary['studies_new']} studies new, {summary['studies_already_here']} already here")
        print(f"  wall time {wall:.1f} s (goal < 30 s), peak memory {rss:,.0f} MB (goal < 2048 MB)")
        print(f"  -> {2 * args.trials / wall:,.0f} trials handled per second, "
              f"{args.trials / wall:,.0f} source trials merged per second")
        again_wall, again_rss, again = cli_merge(a, b)
        print(f"  merging again: {again['trials_new']} new trials, {again['studies_new']} new studies "
              f"in {again_wall:.1f} s, peak {again_rss:,.0f} MB")
        with Archive(a, read_only=True) as archive:
            from warmstart.archive.curate import count_duplicates

            n = archive.con.execute("SELECT count(*) FROM trials").fetchall()[0][0]
            print(f"  archive now holds {n:,} trials (expected {args.trials * 3 // 2:,}), "
                  f"{count_duplicates(archive)} exact duplicates")

        print(f"\nbaseline on a {args.sample:,}-trial sample of each archive:")
        small = work / "small"
        small.mkdir()
        sa, sb = build_pair(small, args.sample, args.per_study)
        naive_copy, bulk_copy = small / "naive.duckdb", small / "bulk.duckdb"
        shutil.copyfile(sa, naive_copy)
        shutil.copyfile(sa, bulk_copy)
        with Archive(naive_copy) as archive:
            t0 = time.perf_counter()
            added = naive_merge(archive, sb)
            naive_time = time.perf_counter() - t0
        from warmstart.archive.merge import merge_archive

        with Archive(bulk_copy) as archive:
            t0 = time.perf_counter()
            bulk = merge_archive(archive, sb)
            bulk_time = time.perf_counter() - t0
        naive_rate, bulk_rate = args.sample / naive_time, args.sample / bulk_time
        print(f"  naive per-study Python merge: {added:,} trials added in {naive_time:.2f} s "
              f"({naive_rate:,.0f} source trials/s)")
        print(f"  bulk merge (same sample):     {bulk.trials_new:,} trials added in {bulk_time:.2f} s "
              f"({bulk_rate:,.0f} source trials/s, {bulk_rate / naive_rate:.1f}x the naive loop)")
        full_rate = args.trials / wall
        print(f"  bulk merge at full size, whole process included: {full_rate:,.0f} source trials/s "
              f"({full_rate / naive_rate:.1f}x the naive loop's rate)")
        png = out / "bench_curate.png"
        plot({"naive loop (sample)": naive_rate, "bulk merge (sample)": bulk_rate,
              f"bulk merge ({args.trials:,}, CLI)": full_rate}, png)
        print(f"\nplot: {png}")
    finally:
        for path in work.glob("**/*.duckdb*"):
            path.unlink()


if __name__ == "__main__":
    main()
