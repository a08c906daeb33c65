"""`warmstart tune` is warm when the archive holds related studies, and says so."""

import json

import pandas as pd
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
