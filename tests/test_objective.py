"""External objectives: a command run per config, and a Python callable.

The outside reference here is a real child process: a separate Python
interpreter reads the config with ``json.loads`` / ``argparse`` and reports
what it saw, so the hand-over is checked end to end.
"""

from __future__ import annotations

import json
import math
import pickle
import sys
import textwrap
from pathlib import Path

import pytest

from warmstart.evaluate.objective import CallableObjective, CommandObjective, ObjectiveError, parse_score
from warmstart.evaluate.result import TrialResult
from warmstart.search.baselines import RandomSearch
from warmstart.search.strategy import run_search
from warmstart.space import Space

EXAMPLE = Path(__file__).resolve().parents[1] / "examples" / "objective_script.py"


def _script(tmp_path: Path, body: str) -> list[str]:
    path = tmp_path / "objective.py"
    path.write_text(textwrap.dedent(body), encoding="utf-8")
    return [sys.executable, str(path)]


ECHO = """
    import json, sys
    config = json.loads(sys.stdin.read())
    args = sys.argv[1:]
    pairs = dict(zip(args[0::2], args[1::2]))
    for name, value in config.items():
        text = pairs.get("--" + name)
        seen = text if isinstance(value, str) else json.loads(text)
        if seen != value:
            sys.exit(f"argument --{name} {text!r} does not match stdin value {value!r}")
    print(config["x"] * 2)
"""


def test_command_gets_config_on_stdin_and_as_arguments(tmp_path):
    # reference: the child's own json.loads of stdin and its sys.argv
    argv = _script(tmp_path, ECHO)
    objective = CommandObjective(argv)
    config = {"x": 0.25, "kernel": "rbf", "deep": True, "n": 3}
    result = objective(config)
    assert result.status == "ok" and result.score == 0.5
    assert objective.command_line(config)[len(argv):] == [
        "--x", "0.25", "--kernel", "rbf", "--deep", "true", "--n", "3",
    ]
    assert result.cost_s > 0 and result.finished_at >= result.started_at


def test_command_output_is_what_the_child_saw(tmp_path):
    argv = _script(tmp_path, """
        import json, sys
        config = json.loads(sys.stdin.read())
        print(json.dumps({"score": len(sys.argv) - 1 + config["x"], "note": "extra keys are fine"}))
        print("done")
    """)
    # the JSON line wins although a plain line comes after it
    result = CommandObjective(argv)({"x": 0.5, "y": 1})
    assert result.ok and result.score == 4.5  # 4 arguments + x


def test_example_script_runs(tmp_path):
    # the example shipped in examples/ works as documented
    objective = CommandObjective([sys.executable, str(EXAMPLE)])
    good = objective({"alpha": 0.35, "window": 14, "method": "holt"})
    worse = objective({"alpha": 0.9, "window": 3, "method": "simple"})
    assert good.ok and worse.ok and good.score > worse.score
    bad = objective({"alpha": 0.3, "window": 1, "method": "holt"})
    assert bad.status == "failed" and "too short" in bad.error and "status 1" in bad.error


def test_failing_command_keeps_stderr_tail(tmp_path):
    argv = _script(tmp_path, """
        import sys
        print("loading data", file=sys.stderr)
        print("ValueError: column 'price' is empty", file=sys.stderr)
        sys.exit(3)
    """)
    result = CommandObjective(argv)({"x": 1.0})
    assert result.status == "failed" and result.score is None
    assert result.error.startswith("command exited with status 3; stderr:")
    assert result.error.endswith("ValueError: column 'price' is empty")


def test_no_score_and_bad_scores_are_failed_trials(tmp_path):
    for body, expected in (
        ("print('training finished')", "last line was 'training finished'"),
        ("pass", "printed nothing"),
        ("print('nan')", "non-finite score"),
        ('print(\'{"score": "high"}\')', "a score must be a number"),
    ):
        result = CommandObjective(_script(tmp_path, body))({"x": 1})
        assert result.status == "failed" and expected in result.error, (body, result.error)


def test_timeout_kills_the_command(tmp_path):
    argv = _script(tmp_path, """
        import sys, time
        print("started", file=sys.stderr, flush=True)
        time.sleep(30)
        print(1.0)
    """)
    result = CommandObjective(argv, timeout=1.0)({"x": 1})
    assert result.status == "failed"
    assert "time limit of 1 s" in result.error and "started" in result.error
    assert result.cost_s < 20


def test_command_setup_errors():
    with pytest.raises(ObjectiveError, match="command 'no-such-program-xyz' not found on PATH"):
        CommandObjective(["no-such-program-xyz", "--flag"])
    with pytest.raises(ObjectiveError, match="the command is empty"):
        CommandObjective("   ")
    with pytest.raises(ObjectiveError, match="cannot split command"):
        CommandObjective("python 'unclosed")
    with pytest.raises(ObjectiveError, match="time_limit must be a positive number"):
        CommandObjective([sys.executable], timeout=-1)
    # a string is split like a shell would, but never run by one
    assert CommandObjective(f"{sys.executable} -c 'print(1)'").argv == [sys.executable, "-c", "print(1)"]


def test_parse_score_rules():
    # reference: json.loads / float parse the same text
    assert parse_score("epoch 1\n0.75\n") == 0.75
    assert parse_score('{"score": 0.5}\n{"other": 1}\n') == 0.5
    assert parse_score('{"score": 2}\nlog line\n') == 2.0
    assert parse_score("  -1e-3  \n\n") == -0.001
    with pytest.raises(ObjectiveError, match="the last line was 'accuracy=0.9'"):
        parse_score("accuracy=0.9")


def test_callable_objective():
    def fn(config):
        if config["x"] < 0:
            raise ValueError(f"x={config['x']} must be >= 0")
        return {"score": math.sqrt(config["x"]), "aux": 1} if config["x"] > 1 else config["x"]

    objective = CallableObjective(fn)
    assert objective({"x": 0.5}).score == 0.5
    assert objective({"x": 4.0}).score == 2.0
    failed = objective({"x": -1.0})
    assert failed.status == "failed" and failed.error == "ValueError: x=-1.0 must be >= 0"
    for value, expected in ((float("nan"), "non-finite"), (True, "must be a number"), ({"loss": 1}, "without 'score'")):
        result = CallableObjective(lambda c, v=value: v)({"x": 1})
        assert result.status == "failed" and expected in result.error
    slow = CallableObjective(lambda c: 1.0, time_limit=1e-9)({"x": 1})
    assert slow.status == "failed" and "time limit" in slow.error
    with pytest.raises(ObjectiveError, match="needs a callable"):
        CallableObjective(42)


def test_keyboard_interrupt_is_not_a_failed_trial():
    def fn(config):
        raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        CallableObjective(fn)({"x": 1})


def test_objectives_pickle_and_their_results_reach_the_search_loop_whole(tmp_path):
    """A command objective runs through run_search as it is (no adapter): the
    trial keeps the objective's score and cost, and a failure its error text
    without any prefix."""
    command = pickle.loads(pickle.dumps(CommandObjective(_script(tmp_path, ECHO))))
    assert command({"x": 1.5}).score == 3.0
    space = Space.from_dict({"params": {"x": {"type": "real", "low": 0.0, "high": 2.0}}})
    result = run_search(RandomSearch(space, seed=0), command, 3)
    for trial in result.trials:
        assert trial.status == "ok" and trial.score == pytest.approx(2 * trial.config["x"])
        assert trial.cost_s > 0 and trial.started_at <= trial.finished_at
    failing = CallableObjective(lambda c: (_ for _ in ()).throw(ValueError("bad")))
    trial = run_search(RandomSearch(space, seed=0), failing, 1).trials[0]
    assert trial.status == "failed" and trial.error == "ValueError: bad" and trial.score is None
    result = TrialResult(1.0, "ok", 0.1)
    assert json.loads(json.dumps(result.to_dict()))["score"] == 1.0
