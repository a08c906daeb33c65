"""Benchmark: what damage detection and salvage cost, against baselines measured in the same run.

The scenario is invented: a fictional team's archive of one SVM and one
gradient-boosted model retuned for 50 stores (the archive ``bench_curate.py``
builds: studies of 2,500 trials, placeholder profiles).

What is measured, all in this run, on the same file:

- opening the archive read-only (no block read) and for writing (every block
  of every table read first: ``faults.check_blocks``), and the block read on
  its own; baseline: DuckDB's ``SELECT count(*)`` over the trials (metadata
  only) and a plain ``SELECT *`` of every table into Python;
- ``curate salvage`` of the sound file (the fast path: one statement per
  table), against DuckDB's own ``COPY FROM DATABASE`` into a new file;
- ``curate salvage`` of a copy with 64 bytes flipped in the middle of a block
  of trial configs (the piece-by-piece path), with the rows it could not read.

Run ``python examples/bench_salvage.py`` (``--trials`` to scale down); it
prints figures and ratios and writes a bar chart (PNG); it asserts nothing.
"""

from __future__ import annotations

import argparse
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import duckdb

from warmstart.archive import Archive
from warmstart.archive.faults import check_blocks
from warmstart.archive.salvage import salvage_archive
from warmstart.archive.store import ARCHIVE_TABLES

HERE = Path(__file__).resolve().parent


def timed(fn, repeat: int = 3) -> float:
    """Best wall time of ``repeat`` calls (seconds)."""
    best = float("inf")
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def build(path: Path, trials: int, per_study: int) -> None:
    studies = max(trials // per_study, 1)
    print(f"building an archive of {studies * per_study:,} trials ({studies} studies) ...", flush=True)
    subprocess.run([sys.executable, str(HERE / "bench_curate.py"), "--build", str(path), "0", str(studies),
                    str(per_study)], check=True)


def flip_config_block(src: Path, dst: Path) -> None:
    """A copy with 64 bytes flipped in the middle one of the blocks DuckDB lists for the trials' configs."""
    con = duckdb.connect(str(src), read_only=True)
    block_size, total = con.execute("SELECT block_size, total_blocks FROM pragma_database_size()").fetchone()
    blocks = [r[0] for r in con.execute(
        "SELECT DISTINCT block_id FROM pragma_storage_info('trials') WHERE column_name = 'config' AND block_id >= 0 "
        "AND segment_type <> 'VALIDITY' ORDER BY block_id").fetchall()]
    con.close()
    header = src.stat().st_size - total * block_size  # file header and database headers
    at = header + blocks[len(blocks) // 2] * block_size + block_size // 2
    shutil.copyfile(src, dst)
    with open(dst, "r+b") as fh:
        fh.seek(at)
        chunk = fh.read(64)
        fh.seek(at)
        fh.write(bytes(b ^ 0xFF for b in chunk))


def read_everything(path: Path) -> None:
    con = duckdb.connect(str(path), read_only=True)
    for table in ARCHIVE_TABLES:
        con.execute(f"SELECT * FROM {table}").fetchall()
    con.close()


def duckdb_copy(path: Path, target: Path) -> None:
    target.unlink(missing_ok=True)
    con = duckdb.connect(str(target))
    con.execute("ATTACH ? AS src (READ_ONLY)", [str(path)])
    con.execute(f"COPY FROM DATABASE src TO {target.stem}")
    con.close()


def progress_printer(label: str):
    state = {"table": None}

    def show(table: str, done: int, total: int) -> None:
        if table != state["table"] or done == total or done % 50 == 0:
            print(f"\r  {label}: {table} {done}/{total}        ", end="", flush=True)
        state["table"] = table

    return show


def plot(figures: dict, path: Path) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(8, 3.6))
    names = list(figures)
    values = [figures[k] for k in names]
    ax.barh(names, values, color="#3a7bd5")
    for y, v in enumerate(values):
        ax.text(v, y, f" {v:.2f} s", va="center")
    ax.set_xlim(0, max(values) * 1.3)
    ax.set_xlabel("seconds (best of 3; salvage once)")
    ax.set_title("damage detection and salvage on one archive")
    ax.invert_yaxis()
    fig.tight_layout()
    fig.savefig(path, dpi=120)
    plt.close(fig)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--trials", type=int, default=1_000_000, help="trials in the archive")
    parser.add_argument("--per-study", type=int, default=2_500)
    parser.add_argument("--out", type=Path, default=None, help="folder for the plot (default: a temporary folder)")
    args = parser.parse_args()
    work = Path(tempfile.mkdtemp(prefix="bench_salvage_"))
    out = args.out or work
    out.mkdir(parents=True, exist_ok=True)
    try:
        sound = work / "team.duckdb"
        build(sound, args.trials, args.per_study)
        with Archive(sound, read_only=True) as archive:
            n = archive.con.execute("SELECT count(*) FROM trials").fetchone()[0]
        print(f"  {n:,} trials, file {sound.stat().st_size / 2**20:.0f} MB")

        con = duckdb.connect(str(sound), read_only=True)
        count = timed(lambda: con.execute("SELECT count(*) FROM trials").fetchall())
        blocks = timed(lambda: check_blocks(con, sound, ARCHIVE_TABLES))
        con.close()
        read_all = timed(lambda: read_everything(sound))
        open_read = timed(lambda: Archive(sound, read_only=True).close())
        open_write = timed(lambda: Archive(sound).close())
        print("\nreading every block (best of 3):")
        print(f"  count(*) of trials, metadata only (baseline): {count * 1000:8.1f} ms")
        print(f"  every value of every column hashed (the block read): {blocks * 1000:8.1f} ms "
              f"({blocks / read_all:.2f}x a plain SELECT * of every table into Python, {read_all * 1000:.0f} ms)")
        print(f"  Archive opened read-only (no block read): {open_read * 1000:8.1f} ms")
        print(f"  Archive opened for writing (block read first): {open_write * 1000:8.1f} ms "
              f"(+{(open_write - open_read) * 1000:.0f} ms; {blocks / max(n, 1) * 1e6 * 1000:.2f} ms per million "
              "trials for the block read)")

        copy_target = work / "duckdb_copy.duckdb"
        baseline = timed(lambda: duckdb_copy(sound, copy_target), repeat=1)
        t0 = time.perf_counter()
        clean = salvage_archive(sound, work / "salvaged.duckdb")
        clean_s = time.perf_counter() - t0
        print("\nsalvage of the sound file (one statement per table):")
        print(f"  DuckDB COPY FROM DATABASE (baseline): {baseline:.2f} s")
        print(f"  curate salvage: {clean_s:.2f} s ({clean_s / baseline:.1f}x the baseline; "
              f"complete: {clean.complete})")

        damaged = work / "damaged.duckdb"
        flip_config_block(sound, damaged)
        t0 = time.perf_counter()
        report = salvage_archive(damaged, work / "rescued.duckdb", progress=progress_printer("salvaging"))
        rescue_s = time.perf_counter() - t0
        trials = {t.table: t for t in report.tables}["trials"]
        print("\n\nsalvage of a copy with 64 bytes flipped in a block of trial configs (piece by piece):")
        print(f"  {rescue_s:.2f} s ({rescue_s / baseline:.1f}x the sound-file baseline); trials copied "
              f"{trials.copied:,} of {trials.rows:,}, lost {trials.lost:,} "
              f"({trials.lost / max(trials.rows, 1):.2%}) in column(s) {', '.join(trials.unreadable_columns) or '-'}")
        for line in report.lines()[1:-1]:
            print(" ", line)

        figure = out / "bench_salvage.png"
        plot({"count(*) (metadata)": count, "read every block": blocks, "SELECT * into Python": read_all,
              "open read-only": open_read, "open for writing": open_write,
              "DuckDB COPY FROM DATABASE": baseline, "salvage, sound file": clean_s,
              "salvage, damaged file": rescue_s}, figure)
        print(f"\nplot: {figure}")
    finally:
        if args.out is not None:
            shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
