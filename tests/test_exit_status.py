"""Exit statuses a script can trust (README, `warmstart tune --help`): every trial
failed -> 1; SIGTERM stops a run like Ctrl-C, prints the same summary, exits 143."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import threading
import time

import duckdb
import pandas as pd
import pytest
from click.testing import CliRunner

from warmstart.cli import main

SPACE = '[params.alpha]\ntype = "real"\nlow = 0.0\nhigh = 1.0\n'


def _files(tmp_path, script_body: str):
    data = tmp_path / "orders.csv"  # invented demo data: the scripts ignore it
    pd.DataFrame({"units": [3, 5, 4, 6], "day": [1, 2, 3, 4]}).to_csv(data, index=False)
    space = tmp_path / "space.toml"
    space.write_text(SPACE)
    script = tmp_path / "objective.py"
    script.write_text(script_body)
    return data, space, script


def _tune_two(tmp_path, script_body: str):
    """``tune --budget 2`` of a command objective (in-process)."""
    data, space, script = _files(tmp_path, script_body)
    return CliRunner().invoke(main, ["--archive", str(tmp_path / "a.duckdb"), "tune", str(data), "--target", "units",
                                     "--learner", "larkspur-smoother", "--space", str(space),
                                     "--command", f"{sys.executable} {script}", "--budget", "2"])


def test_every_trial_failed_exits_1(tmp_path):
    result = _tune_two(tmp_path, "import sys\nsys.exit('model diverged')\n")
    assert result.exit_code == 1, result.output
    assert "error: every trial failed (2 of 2)" in result.stderr
    assert "2 trials, 2 failed" in result.stdout
    con = duckdb.connect(str(tmp_path / "a.duckdb"), read_only=True)
    assert con.execute("SELECT count(*) FROM trials WHERE status = 'failed'").fetchall() == [(2,)]
    con.close()


def test_one_success_exits_0(tmp_path):
    result = _tune_two(tmp_path, "import json, sys\nc = json.load(sys.stdin)\nprint(1 - c['alpha'])\n")
    assert result.exit_code == 0, result.output


@pytest.mark.skipif(not hasattr(signal, "SIGTERM"), reason="POSIX signals")
def test_sigterm_prints_the_summary_and_exits_143(tmp_path):
    # each trial takes 0.5 s; SIGTERM lands after the first few are recorded
    data, space, script = _files(
        tmp_path, "import json, sys, time\nc = json.load(sys.stdin)\ntime.sleep(0.5)\nprint(c['alpha'])\n")
    archive = tmp_path / "a.duckdb"
    argv = [sys.executable, "-c", "from warmstart.cli import main; main()", "--archive", str(archive), "tune",
            str(data), "--target", "units", "--learner", "larkspur-smoother", "--space", str(space),
            "--command", f"{sys.executable} {script}", "--budget", "200"]
    proc = subprocess.Popen(argv, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            env={**os.environ, "PYTHONUNBUFFERED": "1"})
    lines: list[str] = []
    reader = threading.Thread(target=lambda: lines.extend(proc.stderr), daemon=True)
    reader.start()
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline and not any(line.startswith("study 1:") for line in lines):
        time.sleep(0.2)  # the study line comes just before the run starts
    time.sleep(2.5)  # a few 0.5 s trials
    proc.send_signal(signal.SIGTERM)
    out = proc.stdout.read()
    proc.wait(timeout=120)
    reader.join(timeout=10)
    proc.stdout.close()
    proc.stderr.close()
    err = "".join(lines)
    assert proc.returncode == 143, err
    assert "interrupted: study 1" in out, (out, err)
    con = duckdb.connect(str(archive), read_only=True)
    n = con.execute("SELECT count(*) FROM trials").fetchall()[0][0]
    con.close()
    assert f"{n} trials" in out and 1 <= n < 200
