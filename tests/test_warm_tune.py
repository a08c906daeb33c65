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


def test_tune_seeds_option_is_kept_with_the_study(tmp_path):
    """`--seeds N` limits how many past configs a warm study tries first; `propose`
    rebuilds the study's search with the same N (real tables from scikit-learn)."""
    runner = CliRunner()
    archive = str(tmp_path / "a.duckdb")
    base = ["--archive", archive, "tune"]
    res = runner.invoke(main, base + [_csv(tmp_path, "wine", load_wine), "--target", "target", "--learner", "knn",
                                      "--budget", "8", "--cv", "3"])
    assert res.exit_code == 0, res.output
    iris = _csv(tmp_path, "iris", load_iris)
    res = runner.invoke(main, base + [iris, "--target", "target", "--learner", "knn", "--budget", "1", "--cv", "3",
                                      "--seeds", "1", "--task", "iris one seed"])
    assert res.exit_code == 0, res.output
    assert "1 past config(s) first" in res.stderr
    res = runner.invoke(main, base + [iris, "--target", "target", "--learner", "knn", "--budget", "1", "--cv", "3",
                                      "--task", "iris ten seeds"])
    assert res.exit_code == 0, res.output
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
    bad = runner.invoke(main, base + [iris, "--target", "target", "--learner", "knn", "--seeds", "11"])
    assert bad.exit_code != 0 and "--seeds" in bad.output and "Traceback" not in bad.output
