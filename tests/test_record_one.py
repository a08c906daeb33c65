"""The one-row record path (``Archive.record_trial``: one parameterised INSERT)
against the table path (``Archive.add_trials``: a registered frame).

Both must store a trial byte for byte alike (config text, content key,
score, status, times, error), or dedupe and merge would see one trial as
two. The reference for the content key is ``hashlib.sha256`` of
"fingerprint|learner|config JSON" (Python's standard library); the config
text is read back with ``json.loads`` (the values and the sorted keys). Data is invented (random configs with fixed seeds).
"""

from __future__ import annotations

import hashlib
import json
import math
from datetime import datetime, timedelta, timezone

import numpy as np
import pandas as pd
import pytest
from hypothesis import example, given, settings
from hypothesis import strategies as st

from warmstart.archive.store import Archive
from warmstart.errors import IngestError, SpaceError
from warmstart.space import Space

# every kind, odd levels (numbers, booleans, text that looks like JSON) and a conditional parameter
ODD_SPACE = Space.from_dict({"params": {
    "lr": {"type": "real", "low": 1e-7, "high": 10.0, "log": True},
    "frac": {"type": "real", "low": -1.0, "high": 1.0},
    "units": {"type": "integer", "low": 1, "high": 4096, "log": True},
    "mode": {"type": "choice", "choices": ["a", 2, True, 0.5, "{\"x\": 1}", "é"]},
    "depth": {"type": "integer", "low": -3, "high": 3, "when": {"mode": ["a", 2]}},
}})
COLUMNS = "number, config, score, status, cost_s, started_at, finished_at, error, content_key, fold_scores"


def _two_studies(archive: Archive, space: Space, frame: pd.DataFrame) -> tuple[int, int]:
    task = archive.add_task("invented", frame, target="y")
    return (archive.add_study(task, "net", space, metric="loss", maximize=False),
            archive.add_study(task, "net", space, metric="loss", maximize=False))


def _rows(archive: Archive, study: int) -> list[tuple]:
    return archive.con.execute(f"SELECT {COLUMNS} FROM trials WHERE study_id = ? ORDER BY number", [study]).fetchall()


@pytest.fixture
def frame() -> pd.DataFrame:
    rng = np.random.default_rng(3)
    return pd.DataFrame({"f": rng.normal(size=30), "y": rng.integers(0, 2, size=30)})


def test_one_row_and_table_paths_store_identical_rows(tmp_path, frame):
    with Archive(tmp_path / "a.duckdb") as archive:
        task = archive.add_task("invented", frame, target="y")
        fp = archive.tasks()["fingerprint"].iloc[0]

        @settings(max_examples=5, deadline=None)
        @given(seed=st.integers(0, 2**31 - 1), n=st.integers(1, 6))
        def check(seed, n):
            rng = np.random.default_rng(seed)
            configs = ODD_SPACE.sample(n, rng=rng)
            scores = [float(v) for v in rng.normal(size=n) * 10.0 ** rng.integers(-8, 8, size=n)]
            scores[0] = float("nan") if seed % 3 == 0 else scores[0]  # a failed trial now and then
            status = ["failed" if seed % 5 == 1 and i == n - 1 else "ok" for i in range(n)]
            cost = [None if i % 2 else float(rng.random() * 100) for i in range(n)]
            start = datetime(2026, 3, 1, 12, 0, 0, 123456)
            started = [start + timedelta(seconds=float(rng.random() * 1e5)) for _ in range(n)]
            finished = [s + timedelta(microseconds=int(rng.integers(1, 10**9))) for s in started]
            errors = [None if i % 3 else "worker lost" for i in range(n)]
            one = archive.add_study(task, "net", ODD_SPACE, metric="loss", maximize=False)
            table = archive.add_study(task, "net", ODD_SPACE, metric="loss", maximize=False)
            for i, config in enumerate(configs):
                archive.record_trial(one, config, scores[i], status=status[i], cost_s=cost[i],
                                     started_at=started[i], finished_at=finished[i], error=errors[i])
            rows = pd.DataFrame([{**c} for c in configs], columns=ODD_SPACE.names)
            rows = rows.astype(object).where(rows.notna(), None)
            rows["score"], rows["status"], rows["cost_s"] = scores, status, cost
            rows["started_at"], rows["finished_at"], rows["error"] = started, finished, errors
            archive.add_trials(table, rows)
            a, b = _rows(archive, one), _rows(archive, table)
            assert a == b
            for row, config in zip(a, configs):
                assert json.loads(row[1]) == ODD_SPACE.normalize(config) and list(json.loads(row[1])) == sorted(config)
                assert row[8] == hashlib.sha256(f"{fp}|net|{row[1]}".encode()).hexdigest()

        check()


def test_failed_scores_costs_times_and_errors_match_the_table_path(tmp_path, frame):
    configs = ODD_SPACE.sample(6, rng=11)
    cases = [  # score, status, error: what each path makes of it
        (None, "ok", None), (float("inf"), "ok", None), (-float("inf"), None, None),
        (0.25, "failed", None), (0.5, " OK ", None), (float("nan"), "failed", "out of memory"),
    ]
    aware = datetime(2026, 3, 1, 14, 0, tzinfo=timezone(timedelta(hours=2)))  # 12:00 UTC
    with Archive(tmp_path / "a.duckdb") as archive:
        one, table = _two_studies(archive, ODD_SPACE, frame)
        for config, (score, status, error) in zip(configs, cases):
            archive.record_trial(one, config, score, status=status, error=error, started_at=aware,
                                 finished_at="2026-03-01T12:30:00Z")
        rows = pd.DataFrame(configs, columns=ODD_SPACE.names).astype(object)
        rows = rows.where(rows.notna(), None)
        rows["score"] = [c[0] for c in cases]
        rows["status"] = [c[1] for c in cases]
        rows["error"] = [c[2] for c in cases]
        rows["started_at"], rows["finished_at"] = [aware] * 6, ["2026-03-01T12:30:00Z"] * 6
        archive.add_trials(table, rows)
        a, b = _rows(archive, one), _rows(archive, table)
    assert a == b
    assert [r[3] for r in a] == ["failed", "failed", "failed", "failed", "ok", "failed"]
    assert a[0][5] == datetime(2026, 3, 1, 12, 0) and a[0][6] == datetime(2026, 3, 1, 12, 30)


def test_one_row_errors_name_the_field_and_leave_the_archive_unchanged(tmp_path, frame, table_dump):
    config = ODD_SPACE.sample(1, rng=2)[0]
    with Archive(tmp_path / "a.duckdb") as archive:
        task = archive.add_task("invented", frame, target="y")
        study = archive.add_study(task, "net", ODD_SPACE, metric="accuracy")
        archive.record_trial(study, config, 0.5)
        before = table_dump(archive.con)
        with pytest.raises(IngestError, match=r"trial of study 1: row 1, column 'score': value 1.5 is impossible "
                                              r"for metric 'accuracy'"):
            archive.record_trial(study, config, 1.5)
        with pytest.raises(IngestError, match=r"column 'score': value 'high' is not a number"):
            archive.record_trial(study, config, "high")
        with pytest.raises(IngestError, match=r"column 'score': value True is a boolean"):
            archive.record_trial(study, config, True)
        with pytest.raises(IngestError, match=r"column 'cost_s': value -1 is not a cost in seconds"):
            archive.record_trial(study, config, 0.5, cost_s=-1)
        with pytest.raises(IngestError, match=r"column 'started_at': value 'yesterday' is not a date-time"):
            archive.record_trial(study, config, 0.5, started_at="yesterday")
        with pytest.raises(SpaceError, match=r"parameter 'units': value 0 is out of range"):
            archive.record_trial(study, dict(config, units=0), 0.5)
        assert table_dump(archive.con) == before
        assert archive.record_trial(study, config, 0.75) == 2


def test_a_deleted_study_is_refused_even_when_its_keys_were_kept(tmp_path, frame):
    config = ODD_SPACE.sample(1, rng=2)[0]
    with Archive(tmp_path / "a.duckdb") as archive:
        one, other = _two_studies(archive, ODD_SPACE, frame)
        archive.record_trial(one, config, 0.5)
        archive.con.execute("DELETE FROM trials WHERE study_id = ?", [one])
        archive.con.execute("DELETE FROM studies WHERE study_id = ?", [one])
        with pytest.raises(Exception, match=rf"no study with id {one}"):
            archive.record_trial(one, config, 0.5)
        assert math.isclose(archive.record_trial(other, config, 0.5), 1)


# -- the batch path of the team service's writer: check_trial, then one INSERT for many ------------------------
BATCH_COLUMNS = "number, config, score, status, cost_s, error, content_key, fold_scores"


def test_checked_batch_stores_what_the_one_row_path_stores(tmp_path, frame):
    other_space = Space.from_dict({"params": {"depth": {"type": "integer", "low": 1, "high": 12},
                                              "loss": {"type": "choice", "choices": ["l1", "l2"]}}})
    with Archive(tmp_path / "a.duckdb") as archive:
        tasks = [archive.add_task("invented", frame, target="y"),
                 archive.add_task("invented too", frame.assign(f=frame["f"] * 2), target="y")]
        fps = dict(archive.con.execute("SELECT task_id, fingerprint FROM tasks").fetchall())

        @settings(max_examples=5, deadline=None)
        @given(seed=st.integers(0, 2**31 - 1), n=st.integers(1, 8))
        @example(seed=3, n=1)  # one row per space (the statement of scalars): a NaN score
        @example(seed=5, n=1)  # one row per space: a failed trial
        def check(seed, n):
            rng = np.random.default_rng(seed)
            # three studies in one call: two tasks of one space (one statement), another space (a second)
            plan = [(tasks[0], ODD_SPACE, "net"), (tasks[1], ODD_SPACE, "net"), (tasks[1], other_space, "tree")]
            pairs = [(archive.add_study(t, learner, sp, metric="loss", maximize=False),
                      archive.add_study(t, learner, sp, metric="loss", maximize=False), sp, t, learner)
                     for t, sp, learner in plan]
            batch = []
            for one, two, sp, _, _ in pairs:
                configs = sp.sample(n, rng=rng)
                scores = [float(v) for v in rng.normal(size=n) * 10.0 ** rng.integers(-8, 8, size=n)]
                scores[0] = float("nan") if seed % 3 == 0 else scores[0]
                status = ["failed" if seed % 4 == 1 and i == n - 1 else "ok" for i in range(n)]
                cost = [None if i % 2 else float(rng.random() * 100) for i in range(n)]
                errors = [None if i % 3 else "worker lost" for i in range(n)]
                for i, config in enumerate(configs):
                    archive.record_trial(one, config, scores[i], status=status[i], cost_s=cost[i], error=errors[i])
                first = archive.next_trial_number(two)
                batch += [(two, archive.check_trial(two, config, scores[i], status=status[i], cost_s=cost[i],
                                                    error=errors[i]), first + i) for i, config in enumerate(configs)]
            rng.shuffle(batch)  # interleaved studies
            archive.insert_checked_trials(batch)
            sql = f"SELECT {BATCH_COLUMNS} FROM trials WHERE study_id = ? ORDER BY number"
            for one, two, _, task, learner in pairs:
                a = archive.con.execute(sql, [one]).fetchall()
                b = archive.con.execute(sql, [two]).fetchall()
                assert a == b and [r[0] for r in b] == list(range(1, n + 1))
                for row in b:  # content key: hashlib.sha256 of "fingerprint|learner|config" (standard library)
                    assert row[6] == hashlib.sha256(f"{fps[task]}|{learner}|{row[1]}".encode()).hexdigest()
                assert archive.next_trial_number(two) == n + 1
            assert archive.con.execute("SELECT count(*) FROM trials WHERE finished_at IS NULL").fetchall() == [(0,)]

        check()


def test_check_trial_refuses_as_record_trial_does_and_writes_nothing(tmp_path, frame, table_dump):
    config = ODD_SPACE.sample(1, rng=2)[0]
    with Archive(tmp_path / "a.duckdb") as archive:
        task = archive.add_task("invented", frame, target="y")
        study = archive.add_study(task, "net", ODD_SPACE, metric="accuracy")
        before = table_dump(archive.con)
        with pytest.raises(IngestError, match=r"trial of study 1: row 1, column 'score': value 1.5 is impossible "
                                              r"for metric 'accuracy'"):
            archive.check_trial(study, config, 1.5)
        with pytest.raises(SpaceError, match=r"parameter 'units': value 0 is out of range"):
            archive.check_trial(study, dict(config, units=0), 0.5)
        assert table_dump(archive.con) == before
