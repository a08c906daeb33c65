"""The ``demo`` command: the whole job end to end on an invented scenario."""

from __future__ import annotations

import click

from warmstart.cli.limits import MAX_WORKERS, OutputFolder
from warmstart.cli.main import main
from warmstart.cli.progress import Progress


@main.command()
@click.option("--out", "out_dir", default="demo-out", show_default=True, type=OutputFolder(),
              help="Folder for the demo archive and report (a previous demo archive there is replaced); created "
                   "if missing, inside a directory that exists.")
@click.option("--stores", "n_history", default=16, show_default=True, type=click.IntRange(3, 24),
              help="Invented stores in the tuning history.")
@click.option("--configs", "n_configs", default=48, show_default=True, type=click.IntRange(20, 512),
              help="Configs evaluated on each history store (a Sobol design; fewer is quicker; the replay step "
                   "needs 20).")
@click.option("--budget", default=10, show_default=True, type=click.IntRange(2, 200), help="Queries per search.")
@click.option("--repeats", default=5, show_default=True, type=click.IntRange(2, 100), help="Runs of warm and of cold.")
@click.option("--workers", default=2, show_default=True, type=click.IntRange(1, MAX_WORKERS),
              help=f"Processes (at most {MAX_WORKERS}).")
def demo(out_dir, n_history, n_configs, budget, repeats, workers):
    """Run the whole job on an invented grocery cooperative (fixed seed).

    Builds a tuning history, profiles a new store, shows its neighbors, builds
    the prior, runs warm and cold searches side by side, prints the gain in
    bits with its interval and writes an HTML report. The demo uses its own
    archive in --out, never the one given with --archive.
    """
    if budget > n_configs:
        raise click.BadParameter(
            f"{budget} is above --configs {n_configs}: the replay step evaluates each of a store's recorded configs "
            f"at most once per run; use --budget {n_configs} or less, or more --configs", param_hint="'--budget'")
    from warmstart.demo import run_demo

    run_demo(out_dir, n_history=n_history, n_configs=n_configs, budget=budget, repeats=repeats, workers=workers,
             echo=click.echo, progress=Progress)
