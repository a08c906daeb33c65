"""The command line against a real ``warmstart serve`` on 127.0.0.1 with
``--server URL``: studies, show, neighbors, defaults, prior, ingest, tag,
propose --json, record --trial, and tune with its trials run here. The data
files are invented (random numbers with fixed seeds)."""

from __future__ import annotations

import json

import pytest
from click.testing import CliRunner

from service_support import SPACE, ServerProcess, invented_frame, seed_archive
from warmstart.cli import main


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    folder = tmp_path_factory.mktemp("served")
    seed_archive(folder / "team.duckdb")
    with ServerProcess(folder / "team.duckdb") as proc:
        yield proc


def run(server, *args):
    result = CliRunner().invoke(main, ["--server", server.url, *args])
    return result


def test_read_commands_through_the_service(server, tmp_path):
    data = tmp_path / "shop_new.csv"
    invented_frame(11).to_csv(data, index=False)
    listed = run(server, "studies", "--owner", "dana", "--json")
    assert listed.exit_code == 0, listed.output
    assert [s["task"] for s in json.loads(listed.stdout)] == ["shop 1", "shop 3"]
    shown = run(server, "show", "2", "--top", "3")
    assert shown.exit_code == 0 and shown.stdout.startswith("study 2: bran on task 'shop 2' (imported)")
    near = run(server, "neighbors", str(data), "--target", "y", "--learner", "bran", "-k", "2", "--json")
    assert near.exit_code == 0, near.output
    assert len(json.loads(near.stdout)) == 2
    defaults = run(server, "defaults", "--learner", "bran", "-n", "2", "--json")
    assert defaults.exit_code == 0 and len(json.loads(defaults.stdout)) == 2
    space = tmp_path / "space.json"
    space.write_text(json.dumps(SPACE))
    prior = run(server, "prior", str(data), "--target", "y", "--learner", "bran", "--space", str(space))
    assert prior.exit_code == 0, prior.output
    assert "from 3 past studies" in prior.stdout


def test_ingest_tag_propose_record_through_the_service(server, tmp_path):
    data = tmp_path / "shop_five.csv"
    invented_frame(12).to_csv(data, index=False)
    trials = tmp_path / "trials.csv"
    trials.write_text("x1,x2,score\n1.0,2.0,30.5\n2.0,3.0,12.25\n3.0,2.5,1.75\n")
    space = tmp_path / "space.json"
    space.write_text(json.dumps(SPACE))
    done = run(server, "ingest", str(trials), "--task", "shop five", "--data", str(data), "--target", "y",
               "--learner", "bran", "--space", str(space), "--metric", "loss", "--minimize", "--json")
    assert done.exit_code == 0, done.output
    study = json.loads(done.stdout)["study_id"]
    assert json.loads(done.stdout)["trials"] == 3 and json.loads(done.stdout)["best_score"] == 1.75
    tagged = run(server, "tag", str(study), "site=north")
    assert tagged.exit_code == 0 and "tags site=north" in tagged.stdout
    proposed = run(server, "propose", "--study", str(study), "-k", "2", "--json")
    assert proposed.exit_code == 0, proposed.output
    leases = json.loads(proposed.stdout)
    assert [set(lease) for lease in leases] == [{"trial", "config"}] * 2
    assert leases[0]["config"] != leases[1]["config"]
    recorded = run(server, "record", "--study", str(study), "--trial", str(leases[0]["trial"]), "--score", "0.9")
    assert recorded.exit_code == 0, recorded.output
    assert f"recorded trial {leases[0]['trial']} as number 4 of study {study}" in recorded.stdout
    again = run(server, "record", "--study", str(study), "--trial", str(leases[0]["trial"]), "--score", "0.9")
    assert "recorded before with the same result: nothing changed" in again.stdout
    by_config = run(server, "record", "--study", str(study), "--config", '{"x1": 0.5, "x2": 0.5}', "--score", "9")
    assert by_config.exit_code == 0 and "as number 5" in by_config.stdout
    other = run(server, "record", "--study", "1", "--trial", str(leases[1]["trial"]), "--score", "1")
    assert other.exit_code == 1 and f"lease of study {study}, not of study 1" in other.stderr
    local = CliRunner().invoke(main, ["--archive", str(tmp_path / "x.duckdb"), "record", "--study", "1",
                                      "--trial", "3", "--score", "1"])
    assert local.exit_code == 2 and "--trial names a lease of a team service" in local.stderr


def test_tune_runs_trials_here_and_records_through_the_service(server, tmp_path):
    data = tmp_path / "shop_six.csv"
    invented_frame(13, rows=80).to_csv(data, index=False)
    tuned = run(server, "tune", str(data), "--target", "y", "--learner", "knn", "--budget", "3", "--cold",
                "--cv", "3", "--json")
    assert tuned.exit_code == 0, tuned.output
    summary = json.loads(tuned.stdout)
    assert summary["trial_count"] == 3 and summary["origin"] == "cold"
    shown = run(server, "show", str(summary["study_id"]), "--json")
    info = json.loads(shown.stdout)
    assert info["trial_count"] == 3 and info["finished_at"] is not None
    assert 0 <= info["best_score"] <= 1
