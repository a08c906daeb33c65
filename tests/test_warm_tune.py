"""`warmstart tune` is warm when the archive holds related studies, and says so."""

import json

from click.testing import CliRunner
from sklearn.datasets import load_breast_cancer, load_iris, load_wine

from warmstart.archive import Archive
from warmstart.cli import main


def _csv(tmp_path, name, loader):
    path = tmp_path / f"{name}.csv"
    loader(as_frame=True).frame.to_csv(path, index=False)
    return str(path)


def test_tune_is_warm_when_related_studies_exist_and_cold_on_request(tmp_path):
    runner = CliRunner()
    archive = str(tmp_path / "a.duckdb")
    base = ["--archive", archive, "tune"]
    for name, loader in (("iris", load_iris), ("wine", load_wine)):
        res = runner.invoke(main, base + [_csv(tmp_path, name, loader), "--target", "target", "--learner", "knn",
                                          "--budget", "6", "--cv", "3"])
        assert res.exit_code == 0, res.output
    # the first study had nothing to learn from; the second learned from the first
    first_note = res.stderr
    assert "warm start from 1 past studies of 'knn'" in first_note and "'iris'" in first_note
    cancer = _csv(tmp_path, "cancer", load_breast_cancer)
    res = runner.invoke(main, base + [cancer, "--target", "target", "--learner", "knn", "--budget", "4", "--cv", "3"])
    assert res.exit_code == 0, res.output
    assert "warm start from 2 past studies" in res.stderr
    res = runner.invoke(main, base + [cancer, "--target", "target", "--learner", "knn", "--budget", "3", "--cv", "3",
                                      "--cold"])
    assert "cold start (--cold)" in res.stderr
    with Archive(archive, read_only=True) as a:
        studies = a.studies()
        warm = a.study(3)
    assert studies["origin"].tolist() == ["cold", "warm", "warm", "cold"]
    assert {n["task"] for n in warm["prior"]["neighbors"]} == {"iris", "wine"}
    assert abs(sum(n["weight"] for n in warm["prior"]["neighbors"]) - 1) < 1e-9
    # propose rebuilds the warm search with its prior
    res = runner.invoke(main, ["--archive", archive, "propose", "--study", "3", "-k", "2"])
    assert res.exit_code == 0, res.output
    assert "warm start" in res.stderr
    assert len([json.loads(line) for line in res.stdout.splitlines()]) == 2


def test_tune_ranked_first_option_is_kept_with_the_study(tmp_path):
    """`--ranked-first N` starts a warm study with a ranked list of N past configs (instead of
    the mixture); `propose` rebuilds the study's search with the same N (real tables
    from scikit-learn). Its old name `--seeds` still works, with a note."""
    runner = CliRunner()
    archive = str(tmp_path / "a.duckdb")
    base = ["--archive", archive, "tune"]
    res = runner.invoke(main, base + [_csv(tmp_path, "wine", load_wine), "--target", "target", "--learner", "knn",
                                      "--budget", "8", "--cv", "3"])
    assert res.exit_code == 0, res.output
    iris = _csv(tmp_path, "iris", load_iris)
    res = runner.invoke(main, base + [iris, "--target", "target", "--learner", "knn", "--budget", "1", "--cv", "3",
                                      "--ranked-first", "1", "--task", "iris one seed"])
    assert res.exit_code == 0, res.output
    assert "1 past config(s) first" in res.stderr
    assert "deprecated" not in res.stderr
    res = runner.invoke(main, base + [iris, "--target", "target", "--learner", "knn", "--budget", "1", "--cv", "3",
                                      "--seeds", "10", "--task", "iris ten seeds"])  # the old name
    assert res.exit_code == 0, res.output
    assert "note: --seeds is deprecated and will go; it is now --ranked-first 10" in res.stderr
    with Archive(archive, read_only=True) as a:
        one, ten = a.study(2), a.study(3)
        first_one = a.trials(2)["config"][0]
        first_ten = a.trials(3)["config"][0]
    assert one["prior"]["n_seeds"] == 1 and ten["prior"]["n_seeds"] == 10
    assert first_one == first_ten  # both start with the prior's best-ranked past config
    # after one seed, the 1-seed study's next proposal is the design point, not another past config
    proposals = {}
    for study in (2, 3):
        res = runner.invoke(main, ["--archive", archive, "propose", "--study", str(study)])
        assert res.exit_code == 0, res.output
        proposals[study] = json.loads(res.stdout)
    with Archive(archive, read_only=True) as a:
        past = [c for c in a.trials(1)["config"]]
    assert proposals[3] in past and proposals[2] not in past
    bad = runner.invoke(main, base + [iris, "--target", "target", "--learner", "knn", "--ranked-first", "11"])
    assert bad.exit_code == 2 and "'--ranked-first'" in bad.stderr and "0<=x<=10" in bad.stderr
    both = runner.invoke(main, base + [iris, "--target", "target", "--learner", "knn", "--ranked-first", "2",
                                       "--seeds", "2"])
    assert both.exit_code == 2 and "give only --ranked-first" in both.stderr


def test_tune_help_shows_ranked_first_beside_seed_and_hides_the_old_name():
    out = CliRunner().invoke(main, ["tune", "--help"])
    assert out.exit_code == 0
    text = " ".join(out.stdout.split())  # click wraps the help
    assert "--ranked-first N" in text and "(Not a random seed: that is --seed.)" in text
    assert "--seeds" not in text


# -- a warm study keeps the prior it started with --------------------------------------
TOY_SPACE = {"params": {"x": {"type": "real", "low": 0.0, "high": 1.0},
                        "k": {"type": "integer", "low": 1, "high": 64, "log": True}}}


def _toy_trials(path, best_x: float, seed: int) -> str:
    """24 configs with invented scores peaking at x = best_x, k = 8."""
    import numpy as np
    import pandas as pd

    rng = np.random.default_rng(seed)
    x, k = rng.random(24), rng.integers(1, 65, 24)
    score = 1 - (x - best_x) ** 2 - 0.05 * (np.log2(k) - 3) ** 2
    pd.DataFrame({"x": x, "k": k, "score": score}).to_csv(path, index=False)
    return str(path)


def _resample_csv(tmp_path, name, loader, seed) -> str:
    frame = loader(as_frame=True).frame.sample(frac=1.0, replace=True, random_state=seed)
    path = tmp_path / f"{name}-{seed}.csv"
    frame.to_csv(path, index=False)
    return str(path)


def test_propose_on_a_warm_study_ignores_studies_added_since(tmp_path):
    """`propose` on a warm study rebuilds the prior the study started with
    (stored with the study), so studies added to the archive in between do
    not change its proposals; a new study on the same data started now does
    see them (so the comparison could fail). Tables: scikit-learn's bundled
    datasets and bootstrap resamples of them; trial scores invented."""
    import sys

    runner = CliRunner()
    archive = str(tmp_path / "a.duckdb")
    space = tmp_path / "toy.json"
    space.write_text(json.dumps(TOY_SPACE))
    script = tmp_path / "never_run.py"
    script.write_text("print(0.5)\n")

    def ingest(task, data, best_x, seed):
        trials = _toy_trials(tmp_path / f"trials of {task}.csv", best_x, seed)
        res = runner.invoke(main, ["--archive", archive, "ingest", trials, "--task", task, "--data", data,
                                   "--target", "target", "--learner", "toy", "--space", str(space)])
        assert res.exit_code == 0, res.output

    ingest("iris", _csv(tmp_path, "iris", load_iris), 0.2, 1)
    ingest("wine", _csv(tmp_path, "wine", load_wine), 0.25, 2)
    cancer = _csv(tmp_path, "cancer", load_breast_cancer)

    def new_study(name) -> int:
        res = runner.invoke(main, ["--archive", archive, "tune", cancer, "--target", "target", "--learner", "toy",
                                   "--space", str(space), "--command", f"{sys.executable} {script}",
                                   "--budget", "0", "--task", name, "--json"])
        assert res.exit_code == 0, res.output
        assert "warm start from" in res.stderr
        return json.loads(res.stdout)["study_id"]

    def propose(study) -> list:
        res = runner.invoke(main, ["--archive", archive, "propose", "--study", str(study), "-k", "3", "--json"])
        assert res.exit_code == 0, res.output
        return json.loads(res.stdout)["configs"]

    study = new_study("cancer")
    before = propose(study)
    # teammates add close relatives of the task, whose best configs lie elsewhere
    for seed in (11, 12):
        ingest(f"cancer resample {seed}", _resample_csv(tmp_path, "cancer", load_breast_cancer, seed), 0.9, seed)
    assert propose(study) == before
    started_now = new_study("cancer")  # the same table: the task is reused, and its new study sees the newcomers
    assert propose(started_now) != before
    with Archive(archive, read_only=True) as a:
        kept, fresh = a.study(study)["prior"], a.study(started_now)["prior"]
    assert [s["task"] for s in kept["recipe"]["sources"]] == ["iris", "wine"]
    assert len(fresh["recipe"]["sources"]) == 4
    res = runner.invoke(main, ["--archive", archive, "propose", "--study", str(study)])
    assert "it started with" in res.stderr
