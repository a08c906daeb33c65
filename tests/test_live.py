"""Live protocol: warm and cold searches run side by side on a real objective.

Library checks use the Branin-Hoo function (Dixon & Szegő 1978) as the
objective; the command checks train knn on scikit-learn's bundled iris and
wine tables (real DuckDB files in tmp_path)."""

import json
import math

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner
from sklearn.datasets import load_iris, load_wine

from warmstart.archive import Archive
from warmstart.cli import main
from warmstart.evaluate.learners import cv_objective
from functools import partial

from warmstart.gain.bits import GainError
from warmstart.gain.live import live_gain, live_setup
from warmstart.search.density import DensitySearch
from warmstart.prior import PriorError, Source, prior_from_sources, within_study_quantiles
from warmstart.search.testfunctions import branin


def _branin_prior(f, n=512):
    """A prior from one past study of the very same function (a perfect neighbor), 512 configs:
    its ten best lie in the top 2 % of the function, inside the target set."""
    configs = f.space.sobol(n, 1)
    scores = np.array([f(c) for c in configs])
    source = Source(study_id=1, task_id=1, task="same function", X=f.space.encode(configs),
                    quantile=within_study_quantiles(scores, maximize=False), numbers=np.arange(1, n + 1),
                    clipped=np.zeros(n, dtype=bool))
    return prior_from_sources(f.space, [source])


def test_live_gain_on_branin_with_a_perfect_past_study():
    f = branin()
    # six runs: the smallest number at which the Wilcoxon test over runs behind the verdict can
    # reach p < 0.05 (with five, the exact two-sided p-value is at least 2 / 2^5 = 0.0625)
    result = live_gain(f.space, f, _branin_prior(f), budget=10, repeats=6, gamma=0.05, maximize=False, seed=2)
    t = result.tasks[0]
    # target set: the top 5 % of the 64-config reference sample, so p = its share of that sample
    assert t.p == pytest.approx(np.mean(result.reference_scores <= np.quantile(result.reference_scores, 0.05)),
                                abs=1.5 / 64)
    # the definitions of DESIGN §7: bits over uniform = log2(q / p), gain = log2(q_warm / q_cold)
    assert t.bits_warm == pytest.approx(math.log2(t.q_warm / t.p))
    assert t.gain == pytest.approx(math.log2(t.q_warm / t.q_cold))
    # a prior from the same function knows where Branin's minima are: warm hits far more often
    assert t.gain_low > 0 and t.verdict == "helped"
    assert t.first_hit_warm <= t.first_hit_cold


class _Counted:
    """Branin with a count of its evaluations (one process: workers=1)."""

    def __init__(self, f):
        self.f, self.space, self.calls = f, f.space, 0

    def __call__(self, config):
        self.calls += 1
        return self.f(config)


def test_live_further_searches_and_fixed_lists_on_branin():
    f = _Counted(branin())
    minima = list(f.f.minimizers)  # published minimisers, f = 0.397887 (Dixon & Szego 1978)
    lists = {"minima_repeated": minima * 4,  # 12 configs: every one of the 10 queries hits
             "two_minima": minima[:2]}        # 2 configs: two hits, then 8 queries not made = misses
    result = live_gain(f.space, f, _branin_prior(f.f), budget=10, repeats=5, maximize=False, seed=4,
                       searches={"cold_again": partial(DensitySearch, f.space, prior=None, maximize=False)},
                       lists=lists)
    t = result.tasks[0]
    # analytic: a search that always hits scores log2(1/p) bits over uniform (DESIGN §9)
    assert t.extra["q_minima_repeated"] == 1.0
    assert t.extra["bits_minima_repeated"] == pytest.approx(math.log2(1 / t.p))
    assert t.extra["q_two_minima"] == pytest.approx(0.2)
    assert result.hits["two_minima"].tolist() == [[True, True] + [False] * 8]  # run once; unmade queries miss
    assert result.hits["cold_again"].shape == (5, 10)
    # the same search with the same seeds scores what cold scores, and costs no training at all:
    # every config it meets is in the shared cache (64 reference configs, then warm, cold, the lists)
    assert t.extra["bits_cold_again"] == pytest.approx(t.bits_cold)
    assert np.array_equal(result.curves["cold_again"][0], result.curves["cold"][0])
    assert f.calls <= 64 + 2 * 5 * 10 + 3
    assert result.pooled.extra["bits_minima_repeated"] == pytest.approx(math.log2(1 / t.p))


def test_live_evaluates_each_config_once_per_process():
    f = _Counted(branin())
    result = live_gain(f.space, f, _branin_prior(f.f), budget=8, repeats=3, maximize=False, seed=0,
                       lists={"minima": list(f.f.minimizers) * 3})
    distinct = {f.space.canonical_json(c) for c in f.space.sobol(64, np.random.default_rng(10_007))}
    assert len(distinct) == 64 and result.tasks[0].extra["q_minima"] == 1.0
    # the three minima are trained once each, though the list proposes each of them three times
    assert f.calls <= 64 + 2 * 3 * 8 + 3


@pytest.mark.parametrize("searches, lists, message", [
    ({"warm": partial(DensitySearch, prior=None)}, {}, r"not warm, cold or library_default; got \['warm'\]"),
    ({"a": partial(DensitySearch, prior=None)}, {"a": []}, r"must be distinct.*got \['a'\]"),
])
def test_live_refuses_clashing_search_labels(searches, lists, message):
    f = branin()
    with pytest.raises(GainError, match=message):
        live_gain(f.space, f, _branin_prior(f), budget=4, repeats=2, maximize=False, searches=searches, lists=lists)


@pytest.fixture(scope="module")
def knn_archive(tmp_path_factory):
    """knn studies on wine (a real table that ships with scikit-learn), 16 Sobol configs."""
    path = tmp_path_factory.mktemp("live") / "history.duckdb"
    wine = load_wine(as_frame=True).frame
    objective = cv_objective(wine, "target", "knn", cv=3, seed=0)
    configs = objective.space.sobol(16, 0)
    trials = pd.DataFrame(configs)
    trials["score"] = [objective(c).score for c in configs]
    with Archive(str(path)) as archive:
        archive.ingest(trials, task="wine", data=wine, target="target", learner="knn", space=objective.space,
                       metric="accuracy")
    return str(path)


@pytest.fixture(scope="module")
def iris_csv(tmp_path_factory):
    path = tmp_path_factory.mktemp("data") / "iris.csv"
    frame = load_iris(as_frame=True).frame
    frame.columns = ["sepal length", "sepal width", "petal length", "petal width", "species"]
    frame.to_csv(path, index=False)
    return str(path)


def test_gain_live_command_table_and_json(knn_archive, iris_csv, tmp_path):
    runner = CliRunner()
    report = tmp_path / "live.html"
    res = runner.invoke(main, ["--archive", knn_archive, "gain", "--data", iris_csv, "--target", "species",
                               "--learner", "knn", "--budget", "4", "--repeats", "2", "--cv", "3",
                               "--report", str(report)])
    assert res.exit_code == 0, res.output
    assert "live: knn on iris.csv (classification), 3-fold accuracy; prior over 3 parameter(s) from 1 past studies" \
        in res.stdout
    assert "knn, budget 4, 2 runs each (target: top 5% of a 64-config Sobol sample; live)" in res.stdout
    assert "median queries to the first hit" in res.stdout and report.exists()
    # the practitioner's alternative: scikit-learn's default knn first, then a cold search
    assert "the library's default first, then a cold search" in res.stdout
    res = runner.invoke(main, ["--archive", knn_archive, "gain", "--data", iris_csv, "--target", "species",
                               "--learner", "knn", "--budget", "4", "--repeats", "2", "--cv", "3", "--json"])
    assert res.exit_code == 0, res.output
    (only,) = json.loads(res.stdout)
    assert (only["replay"], only["budget"], only["repeats"], only["permuted"]) == ("live", 4, 2, False)
    (task,) = only["tasks"]
    assert 1 / 64 <= task["p"] <= 1 and 0 <= task["q_warm"] <= 1 and 0 <= task["q_cold"] <= 1
    assert 0 <= task["q_library_default"] <= 1
    if not task["smoothed"]:
        assert task["bits_cold"] == pytest.approx(math.log2(task["q_cold"] / task["p"]))


@pytest.mark.parametrize("args, message", [
    (["--data", "IRIS", "--learner", "knn"], "needs both --data FILE and --target COL"),
    (["--data", "IRIS", "--target", "species"], "needs exactly one --learner (got 0)"),
    (["--data", "IRIS", "--target", "species", "--learner", "knn", "--learner", "svm"], "exactly one --learner (got 2)"),
    (["--data", "IRIS", "--target", "kind", "--learner", "knn"], "target column 'kind' not found"),
    (["--data", "IRIS", "--target", "species", "--learner", "knn", "--task", "wine"], "--task picks held-out tasks"),
    (["--data", "IRIS", "--target", "species", "--learner", "knn", "--metric", "auc"], "auc"),
    (["--learner", "knn", "--metric", "accuracy"], "--metric is for a live comparison"),
    (["--data", "IRIS", "--target", "species", "--learner", "knn", "--replay", "surrogate"],
     "with --data the searches train on the data itself"),
])
def test_gain_live_bad_input(knn_archive, iris_csv, args, message):
    args = [iris_csv if a == "IRIS" else a for a in args]
    res = CliRunner().invoke(main, ["--archive", knn_archive, "gain"] + args)
    assert res.exit_code != 0
    assert message in res.output
    assert "Traceback" not in res.output


def test_live_setup_is_what_the_command_compares(knn_archive):
    wine = load_wine(as_frame=True).frame
    iris = load_iris(as_frame=True).frame
    with Archive(knn_archive, read_only=True) as archive:
        # wine is the archive's only task: its own studies are left out, so no prior can be built
        with pytest.raises(PriorError, match="1 are of an excluded task"):
            live_setup(archive, wine, "target", "knn", cv=3)
        other = live_setup(archive, iris, "target", "knn", cv=3)
    assert other.excluded == [] and len(other.prior.sources) == 1
    assert other.kind == "classification" and other.objective.metric == "accuracy"
    assert other.default.config["n_neighbors"] == 5  # scikit-learn's KNeighborsClassifier default
