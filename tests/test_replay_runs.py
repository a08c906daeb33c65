"""A run of the nearest replay evaluates each recorded config at most once.

Each query evaluates the nearest recorded config (unit-cube distance) that the
run has not evaluated yet, the usual convention for replaying a table of
recorded evaluations. References: a brute-force nearest neighbour written here
with numpy (squared differences on continuous coordinates, 1 for a choice
mismatch, as `Space` documents), and the runs' own figures computed again in
another process or alone (state must not leak). The recorded scores are
random numbers from a seeded generator and an invented toy landscape
(synthetic, not a scenario); the archive is a real DuckDB file in tmp_path.
"""

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner
from hypothesis import given, settings
from hypothesis import strategies as st

from warmstart.archive import Archive
from warmstart.cli import main
from warmstart.errors import WarmstartError
from warmstart.gain.bits import GainError, target_threshold
from warmstart.gain.objectives import NearestReplayRun, ReplayObjective
from warmstart.gain.replay import leave_one_task_out
from warmstart.search.baselines import RandomSearch
from warmstart.search.strategy import run_search
from warmstart.space import Space

SPACE = Space.from_dict({"params": {
    "a": {"type": "real", "low": 0.0, "high": 1.0},
    "b": {"type": "real", "low": 0.01, "high": 100.0, "log": True},
    "c": {"type": "choice", "choices": ["x", "y", "z"]},
}})


def brute_force_order(X, Q):
    """Reference: for each query row in turn, the nearest recorded row not taken yet (first of equals)."""
    taken = []
    for q in Q:
        d = np.array([((q[:2] - x[:2]) ** 2).sum() + float(q[2] != x[2]) for x in X])
        d[taken] = np.inf
        taken.append(int(np.argmin(d)))
    return taken


def recorded(m, seed=0):
    rng = np.random.default_rng(seed)
    X = SPACE.encode(SPACE.sample(m, rng))
    return ReplayObjective(SPACE, X, rng.normal(size=m))


def test_each_query_evaluates_the_nearest_recorded_config_not_evaluated_yet():
    obj = recorded(30)
    Q = SPACE.encode(SPACE.sample(30, 1))
    run = obj.new_run(30)
    assert isinstance(run, NearestReplayRun)
    got = [run(c) for c in SPACE.decode(Q)]
    ref = brute_force_order(obj.X, Q)
    assert run.evaluated.tolist() == ref
    assert got == obj.scores[ref].tolist()
    assert sorted(ref) == list(range(30))  # a full run evaluates every recorded config once


def test_a_run_returning_to_one_config_walks_through_its_neighbours():
    obj = recorded(20, seed=3)
    config = SPACE.decode(obj.X[[4]])[0]
    run = obj.new_run()
    scores = [run(config) for _ in range(5)]
    # the recorded config itself first, then its next nearest, ... never one twice (brute-force reference)
    ref = brute_force_order(obj.X, np.repeat(obj.X[[4]], 5, axis=0))
    assert ref[0] == 4 and len(set(ref)) == 5
    assert scores == obj.scores[ref].tolist()
    # without run state each row is scored on its own: the same recorded score every time
    assert obj.values(np.repeat(obj.X[[4]], 5, axis=0)).tolist() == [obj.scores[4]] * 5


@settings(max_examples=40, deadline=None)
@given(m=st.integers(1, 12), data=st.data())
def test_a_run_never_evaluates_one_recorded_config_twice(m, data):
    obj = recorded(m, seed=m)
    n = data.draw(st.integers(1, m))
    seeds = data.draw(st.lists(st.integers(0, 3), min_size=n, max_size=n))
    # queries drawn from a few seeds: many repeat one another, the case that used to score one hit again and again
    Q = np.vstack([SPACE.encode(SPACE.sample(1, s)) for s in seeds])
    run = obj.new_run(n)
    values = run.values(Q)
    assert len(set(run.evaluated.tolist())) == n
    assert run.evaluated.tolist() == brute_force_order(obj.X, Q)
    assert values.tolist() == obj.scores[run.evaluated].tolist()


def test_a_run_past_its_recorded_configs_is_refused():
    obj = recorded(6)
    with pytest.raises(GainError, match="budget 7 exceeds the 6 recorded configs"):
        obj.new_run(7)
    run = obj.new_run(6)
    run.values(obj.X)
    with pytest.raises(GainError, match="evaluated all 6 recorded configs"):
        run(SPACE.decode(obj.X[:1])[0])
    with pytest.raises(TypeError, match="not callable"):  # a replay is evaluated one run at a time, never whole
        obj(SPACE.decode(obj.X[:1])[0])


def test_runs_of_one_objective_share_no_state():
    obj = recorded(25, seed=2)
    first = run_search(RandomSearch(SPACE, seed=7), obj.new_run(10), 10).scores
    second = run_search(RandomSearch(SPACE, seed=7), obj.new_run(10), 10).scores
    np.testing.assert_array_equal(first, second)  # the same search and seed: the same run, whatever ran before
    assert len(set(first.tolist())) == 10


def test_p_of_the_nearest_replay_is_the_target_share_of_the_recorded_configs():
    obj = recorded(40, seed=5)
    threshold = target_threshold(obj.scores, 0.1)
    # analytic: the top 10 % of 40 distinct scores is 4 configs
    assert obj.uniform_hit_chance(threshold) == pytest.approx(4 / 40)
    assert obj.max_distinct_hits(threshold, 10) == 4


def _score(config, setting):
    """Invented toy landscape: the best `a` and `b` move with the task setting."""
    u = SPACE.encode([config])[0]
    return -((u[0] - setting) ** 2) - (u[1] - 0.5 * setting) ** 2 + (0.02 if config["c"] == "y" else 0.0)


@pytest.fixture(scope="module")
def archive_path(tmp_path_factory):
    path = tmp_path_factory.mktemp("runs") / "history.duckdb"
    with Archive(str(path)) as archive:
        for i, setting in enumerate(np.linspace(0.1, 0.9, 5)):
            configs = SPACE.sobol(24, 0)
            trials = pd.DataFrame(configs)
            trials["score"] = [_score(c, setting) for c in configs]
            rng = np.random.default_rng(i)
            frame = pd.DataFrame(rng.normal(size=(80 + 20 * i, 3)), columns=["f0", "f1", "f2"])
            frame["label"] = (frame["f0"] + rng.normal(size=len(frame)) > 0).astype(int)
            archive.ingest(trials, task=f"toy task {i}", data=frame, target="label", learner="toy", space=SPACE,
                           metric="score")
    return str(path)


def test_replay_figures_do_not_depend_on_workers_or_on_the_other_tasks(archive_path):
    with Archive(archive_path, read_only=True) as archive:
        one = leave_one_task_out(archive, "toy", budget=6, repeats=2, gamma=0.1, seed=4, workers=1).to_frame()
        two = leave_one_task_out(archive, "toy", budget=6, repeats=2, gamma=0.1, seed=4, workers=2).to_frame()
        alone = leave_one_task_out(archive, "toy", budget=6, repeats=2, gamma=0.1, seed=4,
                                   tasks=["toy task 2", "toy task 3"]).to_frame()
    pd.testing.assert_frame_equal(one, two)
    cols = [c for c in one.columns if c.startswith(("q_", "bits_")) or c in ("q_warm", "q_cold", "p")]
    pd.testing.assert_frame_equal(one.set_index("task").loc[["toy task 2", "toy task 3"], cols],
                                  alone.set_index("task")[cols])


def test_a_budget_above_the_recorded_configs_is_refused_before_any_work(archive_path):
    with Archive(archive_path, read_only=True) as archive:
        with pytest.raises(WarmstartError, match=r"budget 25 is above the number of recorded configs of 5 held-out "
                                                 r"task\(s\) of 'toy': 'toy task 0' \(24\)"):
            leave_one_task_out(archive, "toy", budget=25, repeats=2)
        assert leave_one_task_out(archive, "toy", budget=24, repeats=2, tasks=["toy task 0"]).budget == 24
    res = CliRunner().invoke(main, ["--archive", archive_path, "gain", "--learner", "toy", "--budget", "30",
                                    "--repeats", "2"])
    assert res.exit_code == 1 and "Traceback" not in res.output
    assert "evaluates each recorded config at most once per run" in res.output
    assert "lower the budget to at most 24" in res.output
