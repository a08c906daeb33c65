"""Everyday commands load only what they use (issue 17, point 5).

``warmstart studies`` and ``show`` format DuckDB's rows themselves: they must
not import pandas, SciPy or scikit-learn. Checked in a fresh interpreter (a
behaviour check, not a timing; the figures live in examples/bench_cli.py).
The archive here is invented (random numbers, fixed seed).
"""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

from warmstart.archive.store import Archive
from warmstart.cli import main
from warmstart.space import Space

from conftest import SPACE_DICT

HEAVY = ("pandas", "scipy", "sklearn", "matplotlib")

# runs each command line in turn in one fresh interpreter, printing after each the heavy
# modules loaded so far (cumulative: the first command that loads one is the culprit)
_RUNNER = """
import json, sys
from warmstart.cli import main
for args in json.loads(sys.argv[1]):
    try:
        main(args)
    except SystemExit:
        pass
    print("LOADED " + json.dumps([m for m in {heavy!r} if m in sys.modules]), flush=True)
"""


@pytest.fixture(scope="module")
def archive_path(tmp_path_factory):
    """One invented archive for the module: a study with 6 trials (one failed) and an empty one."""
    path = tmp_path_factory.mktemp("quick") / "quick.duckdb"
    space = Space.from_dict(SPACE_DICT)
    rng = np.random.default_rng(3)
    frame = pd.DataFrame({"a": rng.normal(size=40), "b": rng.normal(size=40), "y": rng.integers(0, 2, 40)})
    with Archive(str(path)) as archive:
        # a stand-in profile: these commands never compare profiles, and computing one costs seconds
        task = archive.add_task("invented-task", frame, target="y", profile={"log_rows": 3.7})
        study = archive.add_study(task, learner="svm", space=space, metric="accuracy", owner="ana",
                                  tags={"team": "north"})
        configs = pd.DataFrame(space.sample(6, np.random.default_rng(0)))
        scores = [0.61, 0.72, np.nan, 0.70, 0.55, 0.72]
        archive.add_trials(study, configs.assign(score=scores))
        archive.add_study(task, learner="knn", space=space, metric="accuracy")  # no trials yet
    return path


def _run(archive_path, commands: list[list[str]]) -> list[tuple[str, list[str]]]:
    argv = [[f"--archive={archive_path}", *c] for c in commands]
    out = subprocess.run([sys.executable, "-c", _RUNNER.format(heavy=HEAVY), json.dumps(argv)],
                         capture_output=True, text=True, check=True).stdout
    chunks, text = [], []
    for line in out.splitlines():
        if line.startswith("LOADED "):
            chunks.append(("\n".join(text), json.loads(line[7:])))
            text = []
        else:
            text.append(line)
    return chunks


def test_studies_and_show_load_no_pandas_scipy_or_sklearn(archive_path):
    commands = [["studies"], ["studies", "--tag", "team=north", "--owner", "ana"], ["show", "1"],
                ["show", "2", "--top", "0"]]
    results = _run(archive_path, commands)
    assert len(results) == len(commands)
    for command, (text, loaded) in zip(commands, results):
        assert loaded == [], f"`warmstart {' '.join(command)}` imported {loaded}"
    listing, filtered, shown, empty = (text for text, _ in results)
    assert "invented-task" in listing and "knn" in listing and "team=north" in listing
    assert "svm" in filtered and "knn" not in filtered
    assert "best      0.72" in shown and "trials    6 (1 failed)" in shown
    assert "no successful trials" in empty and "best      -" in empty


def test_studies_rows_match_the_dataframe_listing(archive_path):
    # one listing, two shapes: the pandas-free rows of `studies --json` are Archive.studies()
    out = CliRunner().invoke(main, ["--archive", str(archive_path), "studies", "--json"])
    assert out.exit_code == 0, out.output
    listed = json.loads(out.stdout)
    with Archive(str(archive_path), read_only=True) as archive:
        frame = archive.studies()
    assert [r["study_id"] for r in listed] == frame["study_id"].tolist()
    assert [r["trial_count"] for r in listed] == frame["trial_count"].tolist()
    assert listed[0]["best_score"] == frame["best_score"].iloc[0] == 0.72
    assert listed[1]["best_score"] is None and pd.isna(frame["best_score"].iloc[1])
    assert listed[0]["tags"] == {"team": "north"} and listed[0]["owner"] == "ana"


def test_show_lists_best_trials_first(archive_path):
    out = CliRunner().invoke(main, ["--archive", str(archive_path), "show", "1", "--top", "3"])
    assert out.exit_code == 0, out.output
    lines = out.stdout.splitlines()
    head = next(i for i, line in enumerate(lines) if line.startswith("number"))
    rows = lines[head + 2:]
    assert len(rows) == 3
    # the two 0.72 trials (numbers 2 and 6, in trial order), then 0.70 (number 4)
    assert [int(r.split()[0]) for r in rows] == [2, 6, 4]
    header = lines[head].split()
    assert header[0] == "number" and header[-2:] == ["score", "cost_s"]


def test_help_lists_every_command_without_loading_its_module():
    # `warmstart --help` lists commands from cli.main.COMMAND_HELP; each line must be the
    # command's own (the first line of its docstring), and no command module is imported
    code = ("import sys\nfrom warmstart.cli import main\ntry:\n    main(['--help'])\nexcept SystemExit:\n    pass\n"
            "print(sorted(m for m in sys.modules if m.startswith('warmstart.cli.') and m.endswith('_cmds')),"
            f" [m for m in {HEAVY!r} if m in sys.modules])")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip().splitlines()[-1] == "[] []"
    assert "tune" in out and "Tune LEARNER on DATA" in out


def test_help_lines_agree_with_the_commands():
    import importlib

    import click

    from warmstart.cli.main import COMMAND_HELP, COMMAND_MODULES

    for module in set(COMMAND_MODULES.values()):
        importlib.import_module(f"warmstart.cli.{module}")
    assert set(COMMAND_HELP) == set(COMMAND_MODULES)
    ctx = click.Context(main)
    for name, line in COMMAND_HELP.items():
        assert main.get_command(ctx, name).get_short_help_str(limit=1000) == line, name
