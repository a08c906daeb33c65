"""Replay protocol and the prior/gain commands, on a small synthetic archive
(real DuckDB file in tmp_path)."""

import json

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

from warmstart.archive import Archive
from warmstart.cli import main
from warmstart.prior import Prior
from warmstart.gain.objectives import HeldOutObjective, ReplayObjective, SurrogateObjective
from warmstart.gain.replay import leave_one_task_out, replay_tasks
from warmstart.space import Space

SPACE = Space.from_dict({"params": {
    "a": {"type": "real", "low": 0.0, "high": 1.0},
    "b": {"type": "real", "low": 0.01, "high": 100.0, "log": True},
    "c": {"type": "choice", "choices": ["x", "y"]},
}})


def _frame(setting, seed):
    rng = np.random.default_rng(seed)
    n, d = 120 + int(200 * setting), 3 + int(6 * setting)
    X = rng.normal(size=(n, d)) * (1 + 3 * setting)
    y = (X[:, 0] + rng.normal(scale=0.5 + 2 * setting, size=n) > 0).astype(int)
    frame = pd.DataFrame(X, columns=[f"f{i}" for i in range(d)])
    frame["label"] = y
    return frame


def _score(config, setting):
    """Invented test landscape: the best `a` and `b` move with the task setting."""
    u = SPACE.encode([config])[0]
    return -((u[0] - setting) ** 2) - (u[1] - 0.5 * setting) ** 2 + (0.02 if config["c"] == "y" else 0.0)


@pytest.fixture(scope="module")
def archive_path(tmp_path_factory):
    path = tmp_path_factory.mktemp("replay") / "history.duckdb"
    archive = Archive(str(path))
    for i, setting in enumerate(np.linspace(0.05, 0.95, 8)):
        configs = SPACE.sobol(48, 0)
        trials = pd.DataFrame(configs)
        trials["score"] = [_score(c, setting) for c in configs]
        archive.ingest(trials, task=f"family task {i}", data=_frame(setting, i), target="label",
                       learner="toy", space=SPACE, metric="score")
    archive.close()
    return str(path)


def test_replay_objective_returns_the_nearest_recorded_score():
    rng = np.random.default_rng(0)
    configs = SPACE.sample(40, rng)
    scores = rng.normal(size=40)
    obj = ReplayObjective(SPACE, SPACE.encode(configs), scores)
    assert isinstance(obj, HeldOutObjective)  # the one protocol of replay objectives
    assert isinstance(SurrogateObjective(SPACE, SPACE.encode(configs), scores), HeldOutObjective)
    assert obj.new_run()(configs[7]) == scores[7]  # a recorded config scores what it scored
    # reference: brute-force nearest neighbour in the unit cube (choice mismatch counts 1), each row on its own
    query = SPACE.sample(25, 1)
    Q, X = SPACE.encode(query), SPACE.encode(configs)
    for row, cfg in zip(Q, query):
        d = [((row[:2] - x[:2]) ** 2).sum() + (row[2] != x[2]) for x in X]
        assert obj.values(row[None, :])[0] == scores[int(np.argmin(d))]
        assert obj.new_run()(cfg) == scores[int(np.argmin(d))]  # a fresh run's first query: the nearest


def test_uniform_hit_chance_is_close_to_gamma_on_a_space_filling_design(archive_path):
    with Archive(archive_path, read_only=True) as archive:
        tasks = replay_tasks(archive, "toy", gamma=0.1)
    assert len(tasks) == 8
    for t in tasks:
        assert 0.03 < t.p < 0.2  # Voronoi cells of a Sobol design are roughly equal


def test_leave_one_task_out_measures_transfer(archive_path):
    with Archive(archive_path, read_only=True) as archive:
        result = leave_one_task_out(archive, "toy", budget=8, repeats=6, gamma=0.1, seed=1)
    frame = result.to_frame()
    assert len(frame) == 8
    assert np.isfinite(frame[["bits_warm", "bits_cold", "gain", "gain_low", "gain_high"]].to_numpy()).all()
    assert (frame["gain_low"] <= frame["gain"]).all() and (frame["gain"] <= frame["gain_high"]).all()
    # uniform sampling earns about 0 bits (analytic expectation)
    assert abs(result.pooled.extra["bits_random"]) < 1.0
    # the landscape moves smoothly with the setting, so transfer should help on this family
    assert result.pooled.gain > 0
    assert set(result.curves) >= {"warm", "cold", "random", "defaults", "nearest"}


def test_prior_and_gain_commands(archive_path, tmp_path):
    runner = CliRunner()
    data = tmp_path / "new.csv"
    _frame(0.4, 99).to_csv(data, index=False)
    space_file = tmp_path / "space.json"
    SPACE.save(space_file)
    out = tmp_path / "prior.json"
    res = runner.invoke(main, ["--archive", archive_path, "prior", str(data), "--target", "label", "--learner", "toy",
                               "--space", str(space_file), "-o", str(out)])
    assert res.exit_code == 0, res.output
    assert "prior over 3 parameter(s) from 8 past studies" in res.stdout
    for word in ("  effective: ", "  agreement: ", "  strength n0 = effective x agreement"):  # each figure explained
        assert word in res.stdout
    prior = Prior.load(str(out))
    assert prior.provenance["n_studies"] == 8
    report = tmp_path / "gain.html"
    res = runner.invoke(main, ["--archive", archive_path, "gain", "--learner", "toy", "--budget", "5,8",
                               "--repeats", "3", "--report", str(report)])
    assert res.exit_code == 0, res.output
    assert "pooled over 8 tasks" in res.stdout and "budget 8" in res.stdout
    # what a bit means, once, before the first table
    assert res.stdout.count("+1 bit = twice as likely per query") == 1
    assert res.stdout.index("+1 bit = twice") < res.stdout.index("budget 5")
    html = report.read_text()
    assert html.count("<img") >= 4 and "family task 3" in html
    assert ">None<" not in html and ">nan<" not in html.lower() and "+1 bit = twice as likely" in html
    res = runner.invoke(main, ["--archive", archive_path, "gain", "--learner", "toy", "--budget", "5", "--repeats",
                               "3", "--json"])
    assert res.exit_code == 0
    parsed = json.loads(res.stdout)
    assert parsed[0]["learner"] == "toy" and len(parsed[0]["tasks"]) == 8


@pytest.mark.parametrize("args, message", [
    (["gain", "--learner", "nope"], "no studies of learner 'nope'"),
    (["gain", "--budget", "a,b"], "not a comma-separated list"),
    (["gain", "--budget", "0"], "each budget must be a whole number from 1 to 1,000"),
])
def test_gain_bad_input(archive_path, args, message):
    res = CliRunner().invoke(main, ["--archive", archive_path] + args)
    assert res.exit_code != 0
    assert message in res.output
    assert "Traceback" not in res.output


def test_hindsight_rates_of_a_past_task_identical_to_the_held_out_one():
    from warmstart.gain.bits import target_threshold
    from warmstart.prior import Source, prior_from_sources, within_study_quantiles
    from warmstart.gain.replay import ReplayTask, hindsight_rates

    configs = SPACE.sobol(40, 3)
    X = SPACE.encode(configs)
    scores = np.array([_score(c, 0.3) for c in configs])
    objective = ReplayObjective(SPACE, X, scores)
    threshold = target_threshold(scores, 0.1)  # ceil(0.1 * 40) = 4 target configs
    task = ReplayTask(0, "held out", 0, SPACE, objective, threshold, 0.1, {})

    def source(i, s):
        return Source(study_id=i, task_id=i, task=f"past {i}", X=X, quantile=within_study_quantiles(s),
                      numbers=np.arange(40), clipped=np.zeros(40, bool), similarity=1.0)

    # one past task ranks configs exactly as the held-out task does, one in reverse
    prior = prior_from_sources(SPACE, [source(1, -scores), source(2, scores)])
    for budget in (2, 4, 10):
        rates = hindsight_rates(task, prior, budget)
        # analytic: the identical task lists all 4 targets first, so both figures are min(4, B) / B
        assert rates["ideal_list"] == pytest.approx(min(4, budget) / budget)
        assert rates["best_past_task"] == pytest.approx(min(4, budget) / budget)
    only_reverse = prior_from_sources(SPACE, [source(1, -scores)])
    assert hindsight_rates(task, only_reverse, 4)["best_past_task"] == 0.0  # its top 4 are the 4 worst


def test_surrogate_replay_measures_transfer_and_scores_regions(archive_path):
    with Archive(archive_path, read_only=True) as archive:
        tasks = replay_tasks(archive, "toy", gamma=0.1, objective="surrogate")
        result = leave_one_task_out(archive, "toy", budget=8, repeats=6, gamma=0.1, seed=1, objective="surrogate")
    # analytic: the target set is the top 10 % of the space under uniform sampling
    assert all(abs(t.p - 0.1) < 0.03 for t in tasks)
    assert result.objective == "surrogate"
    frame = result.to_frame()
    assert np.isfinite(frame[["bits_warm", "bits_cold", "gain"]].to_numpy()).all()
    assert abs(result.pooled.extra["bits_random"]) < 1.0  # uniform earns about 0 bits
    assert result.pooled.gain > 0  # the landscape moves smoothly with the setting
    # a region can be hit by every one of B distinct configs
    assert frame["bits_ideal_list"].to_numpy() == pytest.approx(np.log2(1.0 / frame["p"].to_numpy()))


def test_unknown_replay_objective_is_refused(archive_path):
    from warmstart.errors import WarmstartError

    with Archive(archive_path, read_only=True) as archive:
        with pytest.raises(WarmstartError, match="replay objective must be one of 'nearest', 'surrogate', got 'table'; pick one"):
            replay_tasks(archive, "toy", objective="table")


def test_gain_command_with_the_surrogate_replay(archive_path):
    res = CliRunner().invoke(main, ["--archive", archive_path, "gain", "--learner", "toy", "--budget", "5",
                                    "--repeats", "3", "--replay", "surrogate", "--json"])
    assert res.exit_code == 0, res.output
    (shown,) = json.loads(res.stdout)
    # the JSON says how it was run, so a saved file can be read without its command line
    assert (shown["replay"], shown["budget"], shown["repeats"], shown["target_share"], shown["permuted"]) == \
        ("surrogate", 5, 3, 0.05, False)
    res = CliRunner().invoke(main, ["--archive", archive_path, "gain", "--learner", "toy", "--replay", "table"])
    assert res.exit_code != 0 and "'table' is not one of 'nearest', 'surrogate'" in res.output


def test_gain_names_the_tasks_it_knows_when_asked_for_an_unknown_one(archive_path):
    res = CliRunner().invoke(main, ["--archive", archive_path, "gain", "--learner", "toy", "--task", "nope",
                                    "--budget", "5", "--repeats", "2"])
    assert res.exit_code == 1 and "Traceback" not in res.output
    assert "'nope'" in res.output and "'family task 0'" in res.output


def test_gain_prints_verdicts_and_the_permuted_control(archive_path):
    runner = CliRunner()
    base = ["--archive", archive_path, "gain", "--learner", "toy", "--budget", "6", "--repeats", "6"]
    res = runner.invoke(main, base)
    assert res.exit_code == 0, res.output
    assert "win/tie/loss" in res.stdout and "significant losses (paired test over runs, Holm)" in res.stdout
    assert "warm's hit rate above each baseline's on" in res.stdout
    res = runner.invoke(main, base + ["--json"])
    pooled = json.loads(res.stdout)[0]["pooled"]
    assert pooled["wins"] + pooled["ties"] + pooled["losses"] == pooled["n_tasks"] == 8
    assert 0 <= pooled["share_loss_low"] <= pooled["share_loss"] <= pooled["share_loss_high"] <= 1
    task = json.loads(res.stdout)[0]["tasks"][0]
    assert {"p_paired", "p_holm", "outcome"} <= set(task)
    res = runner.invoke(main, base + ["--permuted"])
    assert res.exit_code == 0, res.output
    assert "CONTROL" in res.stdout and "share of tasks reaching >= 1 bit" in res.stdout
    bad = runner.invoke(main, ["--archive", archive_path, "gain", "--learner", "toy", "--data", "x.csv",
                               "--target", "y", "--permuted"])
    assert bad.exit_code != 0 and "--permuted is a control of the replay" in bad.output


def test_permuted_control_gains_nothing(archive_path):
    # the same family on which transfer helps (test_leave_one_task_out_measures_transfer), with every
    # held-out task's scores shuffled: pooled gain of warm over cold stays at or below 0 within its interval
    with Archive(archive_path, read_only=True) as archive:
        result = leave_one_task_out(archive, "toy", budget=8, repeats=6, gamma=0.1, seed=1, permuted=True)
    assert result.permuted and result.pooled.gain_low <= 0.0
    frame = result.to_frame()
    # fixed lists on random target sets: share of tasks reaching 1 bit at most 2^-1 (binomial slack, 8 tasks)
    for label in ("defaults", "nearest"):
        assert (frame[f"bits_{label}"] >= 1.0).mean() <= 0.5 + 3 * np.sqrt(0.25 / len(frame))


@pytest.fixture(scope="module")
def knn_history(tmp_path_factory):
    """knn studies on iris and wine (tables that ship with scikit-learn), 24 Sobol configs each."""
    from sklearn.datasets import load_iris, load_wine

    from warmstart.evaluate.learners import cv_objective

    path = tmp_path_factory.mktemp("knn") / "history.duckdb"
    with Archive(str(path)) as archive:
        for name, loader in (("iris", load_iris), ("wine", load_wine)):
            frame = loader(as_frame=True).frame
            objective = cv_objective(frame, "target", "knn", cv=3, seed=0)
            configs = objective.space.sobol(24, 0)
            trials = pd.DataFrame(configs)
            trials["score"] = [objective(c).score for c in configs]
            archive.ingest(trials, task=name, data=frame, target="target", learner="knn", space=objective.space,
                           metric="accuracy")
    return str(path)


def test_replay_of_a_built_in_learner_has_the_library_default_baseline(knn_history):
    with Archive(knn_history, read_only=True) as archive:
        result = leave_one_task_out(archive, "knn", budget=4, repeats=3, seed=0)
    assert "library_default" in result.curves
    for t in result.tasks:
        assert np.isfinite(t.extra["bits_library_default"])
    assert 0 <= result.pooled.extra["share_warm_above_library_default"] <= 1
