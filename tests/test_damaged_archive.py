"""Damaged archive files: every command names the file and what to do; salvage copies what can be read.

Real DuckDB files made here (three studies of 20,000 trials each, about 8 MB,
so a flip in the middle of the file lands in trial data) are damaged the two
ways disks and copies damage files:

- **cut short**: the file keeps the first half of its bytes;
- **a corrupted block**: 64 bytes flipped (XOR 0xFF) in the middle of the
  file, or in the block DuckDB itself lists (``pragma_storage_info``) for one
  column of the trials.

What DuckDB does with each is checked first, with DuckDB alone (the outside
reference: its own reads of the damaged file), so a change in DuckDB's
behaviour shows up here. Salvage is checked against the undamaged original
(every copied row is one of its rows, tables that read cleanly are equal)
and against DuckDB's own reads of the damaged file vector by vector (2,048
rows, DuckDB's vector size). The data is invented (random numbers, fixed
seeds).
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
from collections import Counter
from pathlib import Path

import duckdb
import pytest
from click.testing import CliRunner
from conftest import dump_tables
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from test_curate import SPACE, cli, make_data
from test_reliability import big_trials

from warmstart.archive import Archive
from warmstart.archive.curate import check_archive
from warmstart.archive.faults import DAMAGED, LOCKED, NOT_A_DATABASE, fault_of
from warmstart.archive.salvage import salvage_archive
from warmstart.cli import main
from warmstart.errors import ArchiveDamagedError, ArchiveError

TRIALS_PER_STUDY = 20_000
VECTOR = 2048  # DuckDB's vector size: a scan reads whole vectors
CONFIG = json.dumps({"C": 1.0, "tol": 0.1, "n_trees": 100, "depth": 3, "kernel": "rbf"})


def sha(path: Path) -> str:
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def build(path: Path, studies: int = 3, per_study: int = TRIALS_PER_STUDY) -> Path:
    with Archive(path) as archive:
        for i in range(studies):
            archive.ingest(big_trials(per_study, i), task=f"depot {i}", data=make_data(i), target="y",
                           learner="svm", space=SPACE, metric="accuracy")
    return path


def cut_short(src: Path, dst: Path) -> Path:
    """A copy keeping the first half of the bytes."""
    shutil.copyfile(src, dst)
    os.truncate(dst, src.stat().st_size // 2)
    return dst


def flip(src: Path, dst: Path, at: int, n: int = 64) -> Path:
    """A copy with ``n`` bytes from offset ``at`` flipped (XOR 0xFF)."""
    shutil.copyfile(src, dst)
    with open(dst, "r+b") as fh:
        fh.seek(at)
        chunk = fh.read(n)
        fh.seek(at)
        fh.write(bytes(b ^ 0xFF for b in chunk))
    return dst


def block_of(path: Path, table: str, column: str) -> int:
    """File offset of the middle of the first block DuckDB lists for ``table.column``.

    The header size (file header and two database headers) is what the file
    holds beyond its blocks, measured with DuckDB's own ``pragma_database_size``.
    """
    con = duckdb.connect(str(path), read_only=True)
    try:
        block_size, total = con.execute("SELECT block_size, total_blocks FROM pragma_database_size()").fetchone()
        block, offset = con.execute(
            "SELECT block_id, block_offset FROM pragma_storage_info(?) WHERE column_name = ? AND block_id >= 0 "
            "AND segment_type <> 'VALIDITY' ORDER BY row_group_id, segment_id LIMIT 1", [table, column]).fetchone()
    finally:
        con.close()
    header = path.stat().st_size - total * block_size
    assert header > 0
    return header + block * block_size + offset + 64


@pytest.fixture(scope="module")
def files(tmp_path_factory) -> dict:
    """The sound archive, its damaged copies, a small sound archive and a data file."""
    root = tmp_path_factory.mktemp("damaged")
    sound = build(root / "sound.duckdb")
    small = build(root / "small.duckdb", studies=1, per_study=50)
    data = root / "depot.csv"
    make_data(0).to_csv(data, index=False)
    return {
        "root": root, "sound": sound, "small": small, "data": data,
        "cut short": cut_short(sound, root / "cut.duckdb"),
        "middle flipped": flip(sound, root / "middle.duckdb", sound.stat().st_size // 2),
        "score block flipped": flip(sound, root / "score.duckdb", block_of(sound, "trials", "score")),
        "key block flipped": flip(sound, root / "key.duckdb", block_of(sound, "trials", "content_key")),
    }


# -- what DuckDB itself does with each file (the reference) -------------------------------------
def duckdb_reads(path: Path, sql: str) -> str:
    """'ok' when DuckDB opens ``path`` and reads the query's rows, else the exception's class and text."""
    try:
        con = duckdb.connect(str(path), read_only=True)
    except duckdb.Error as exc:
        return f"{type(exc).__name__}: {exc}"
    try:
        con.execute(sql).fetchall()
        return "ok"
    except duckdb.Error as exc:
        return f"{type(exc).__name__}: {exc}"
    finally:
        con.close()


def test_duckdb_opens_a_file_cut_short_and_fails_only_reading_past_its_end(files):
    path = files["cut short"]
    assert duckdb_reads(path, "SELECT * FROM studies") == "ok"
    assert duckdb_reads(path, "SELECT count(*) FROM trials") == "ok"  # from metadata
    failure = duckdb_reads(path, "SELECT * FROM trials")
    assert failure.startswith("IOException") and "Could not read enough bytes" in failure


@pytest.mark.parametrize("kind", ["middle flipped", "score block flipped", "key block flipped"])
def test_duckdb_reports_a_flipped_block_only_when_a_query_reads_it(files, kind):
    path = files[kind]
    assert duckdb_reads(path, "SELECT * FROM studies") == "ok"
    failure = duckdb_reads(path, "SELECT * FROM trials")
    assert "Corrupt database file" in failure and "checksum" in failure, (
        f"the flip no longer lands in trial data ({failure}); make the test archive bigger")


def test_duckdb_reads_the_other_columns_of_a_flipped_block_s_table(files):
    assert duckdb_reads(files["score block flipped"], "SELECT study_id, config FROM trials") == "ok"
    assert duckdb_reads(files["key block flipped"], "SELECT study_id, score FROM trials") == "ok"


def test_the_faults_of_real_duckdb_errors_are_recognised(files, held_open, tmp_path):
    con = duckdb.connect(str(files["cut short"]), read_only=True)
    with pytest.raises(duckdb.Error, match="Could not read enough bytes") as cut:
        con.execute("SELECT * FROM trials").fetchall()
    con.close()
    con = duckdb.connect(str(files["score block flipped"]), read_only=True)
    with pytest.raises(duckdb.Error, match="checksum") as flipped:
        con.execute("SELECT score FROM trials").fetchall()
    con.close()
    junk = tmp_path / "junk.duckdb"
    junk.write_bytes(b"not a database")
    with pytest.raises(duckdb.Error, match="not a valid DuckDB database") as not_db:
        duckdb.connect(str(junk))
    held = shutil.copyfile(files["small"], tmp_path / "held.duckdb")
    with held_open(held):
        with pytest.raises(duckdb.Error, match="lock") as locked:
            duckdb.connect(str(held), read_only=True)
    assert [fault_of(e.value) for e in (cut, flipped, not_db, locked)] == [DAMAGED, DAMAGED, NOT_A_DATABASE, LOCKED]
    assert fault_of(ValueError("Corrupt database file")) is None  # only DuckDB's own errors


# -- the library ---------------------------------------------------------------------------------
def test_opening_a_file_cut_short_is_refused_at_once_read_only_or_not(files):
    path = files["cut short"]
    before = sha(path)
    for read_only in (True, False):
        with pytest.raises(ArchiveDamagedError, match=r"cut.duckdb: the archive file is damaged \(the file is "
                                                       r"[\d,]+ bytes but its header counts \d+ blocks"):
            Archive(path, read_only=read_only)
    assert sha(path) == before


def test_opening_a_flipped_file_for_writing_is_refused_and_changes_nothing(files):
    path = files["key block flipped"]
    before = sha(path)
    with pytest.raises(ArchiveDamagedError, match=r"key.duckdb: the archive file is damaged \(blocks that cannot be "
                                                   r"read in table trials: column\(s\) content_key") as caught:
        Archive(path)
    assert [(t, c) for t, c, _ in caught.value.unreadable] == [("trials", "content_key")]
    assert sha(path) == before


def test_reading_a_damaged_block_read_only_names_the_file_and_the_fix(files):
    with Archive(files["score block flipped"], read_only=True) as archive:
        assert len(archive.tasks()) == 3  # blocks that read fine still do
        with pytest.raises(ArchiveDamagedError, match=r"score.duckdb: the archive file is damaged \(DuckDB: Corrupt "
                                                       r"database file.*`warmstart curate salvage .*score.duckdb NEW"):
            archive.studies()  # reads every trial's score
        with pytest.raises(ArchiveDamagedError, match="blocks that cannot be read in table trials: column"):
            check_archive(archive)


# -- every command ------------------------------------------------------------------------------
def commands(f: dict, out: Path = Path("out")) -> dict[str, list]:
    """Every command that opens the archive, with arguments (``out``: where an export would go)."""
    return {
        "studies": ["studies"],
        "show": ["show", "1"],
        "propose": ["propose", "--study", "1"],
        "record": ["record", "--study", "1", "--config", CONFIG, "--score", "0.5"],
        "neighbors": ["neighbors", f["data"], "--target", "y", "--learner", "svm"],
        "prior": ["prior", f["data"], "--target", "y", "--learner", "svm"],
        "defaults": ["defaults", "--learner", "svm"],
        "tune": ["tune", f["data"], "--target", "y", "--learner", "svm", "--budget", "1"],
        "init": ["init"],
        "tag": ["tag", "1", "team=depots"],
        "ingest": ["ingest", f["root"] / "trials.csv", "--task", "depot 9", "--data", f["data"], "--target", "y",
                   "--learner", "svm", "--space", f["root"] / "space.json"],
        "curate check": ["curate", "check"],
        "curate check --fix": ["curate", "check", "--fix"],
        "curate dedupe": ["curate", "dedupe"],
        "curate prune": ["curate", "prune", "--failed", "--yes"],
        "curate export": ["curate", "export", out / "export"],
        "curate merge": ["curate", "merge", f["small"]],
        "gain": ["gain", "--budget", "2"],
    }


READS = ("studies", "show", "propose", "neighbors", "defaults")
SLOW = ("gain", "prior")  # a replay, a prior from 60,000 trials: tens of seconds to minutes when they run


@pytest.fixture(scope="module")
def inputs(files) -> dict:
    """The files `ingest` reads, and what the read commands print on the sound archive."""
    big_trials(5, 9).to_csv(files["root"] / "trials.csv", index=False)
    (files["root"] / "space.json").write_text(json.dumps(SPACE.to_dict()), encoding="utf-8")
    sound = {}
    for name in READS:
        result = cli(files["sound"], *commands(files)[name])
        assert result.exit_code == 0, (name, result.output)
        sound[name] = result.stdout
    return sound


def assert_names_damage(result, path: Path, name: str) -> None:
    assert "Traceback" not in result.output and isinstance(result.exception, SystemExit), (name, result.output)
    assert result.exit_code == (4 if name.startswith("curate check") else 1), (name, result.output)
    assert f"{path}: the archive file is damaged" in result.stderr, (name, result.stderr)
    assert f"`warmstart curate salvage {path} NEW.duckdb`" in result.stderr, (name, result.stderr)


@pytest.mark.parametrize("kind", ["cut short", "score block flipped"])
@pytest.mark.parametrize("name", list(commands({"data": "", "root": Path("."), "small": ""})))
def test_every_command_on_a_damaged_archive_names_the_file_and_the_fix(files, inputs, kind, name, tmp_path):
    path = shutil.copyfile(files[kind], tmp_path / f"{kind.replace(' ', '_')}.duckdb")
    before = sha(path)
    result = cli(path, *commands(files, tmp_path)[name])  # an export would go to tmp_path/export
    assert_names_damage(result, path, name)
    assert sha(path) == before  # never written
    assert not (tmp_path / "export").exists()


@pytest.mark.parametrize("name", [n for n in commands({"data": "", "root": Path("."), "small": ""}) if n not in SLOW])
def test_a_block_the_command_does_not_read_gives_the_right_answer_or_the_message(files, inputs, name, tmp_path):
    # The flipped block holds trial content keys: listing, showing and proposing do not read
    # them and print what they print on the sound archive; everything else stops with the message.
    # (`gain` and `prior` are left out: were they not to read the block, they would run for minutes.)
    path = shutil.copyfile(files["key block flipped"], tmp_path / "key.duckdb")
    before = sha(path)
    result = cli(path, *commands(files, tmp_path)[name])
    if result.exit_code == 0:
        assert name in READS, f"{name} wrote into a damaged archive or checked nothing: {result.output}"
        assert result.stdout == inputs[name]
    else:
        assert_names_damage(result, path, name)
    assert sha(path) == before


def test_every_write_command_refuses_a_file_with_a_flipped_block(files, inputs, tmp_path):
    refused = []
    for name, args in commands(files, tmp_path).items():
        path = shutil.copyfile(files["key block flipped"], tmp_path / "key.duckdb")
        if name not in READS and name not in SLOW:
            result = cli(path, *args)
            assert_names_damage(result, path, name)
            refused.append(name)
    assert {"record", "tune", "init", "tag", "ingest", "curate merge", "curate dedupe"} <= set(refused)


def test_merging_a_damaged_archive_into_a_sound_one_names_it_and_changes_nothing(files, tmp_path):
    here = shutil.copyfile(files["small"], tmp_path / "here.duckdb")
    before = dump_tables(here)
    for kind in ("cut short", "score block flipped"):
        result = cli(here, "curate", "merge", files[kind])
        assert result.exit_code == 1 and "Traceback" not in result.output
        assert f"{files[kind]}" in result.stderr and "damaged" in result.stderr, result.stderr
    assert dump_tables(here) == before


# -- curate check: its exit statuses ------------------------------------------------------------
def test_check_statuses_sound_unsound_busy_damaged_and_cannot(files, held_open, tmp_path):
    sound = shutil.copyfile(files["small"], tmp_path / "sound.duckdb")
    assert cli(sound, "curate", "check").exit_code == 0
    unsound = shutil.copyfile(files["small"], tmp_path / "unsound.duckdb")
    with Archive(unsound) as archive:
        archive.con.execute("UPDATE trials SET score = 7 WHERE number = 1")  # accuracy 7: impossible
    result = cli(unsound, "curate", "check")
    assert result.exit_code == 1 and "scores_out_of_range" in result.stdout
    with held_open(sound) as pid:
        result = cli(sound, "--wait", "0", "curate", "check")
        assert result.exit_code == 3, result.output
        assert f"{sound}: another process is writing to this archive (held by process {pid})" in result.stderr
    result = cli(files["middle flipped"], "curate", "check", "--json")
    assert result.exit_code == 4
    report = json.loads(result.stdout)
    assert report["status"] == "damaged" and report["unreadable"] and report["unreadable"][0]["table"] == "trials"
    assert cli(tmp_path / "nothing.duckdb", "curate", "check").exit_code == 5
    statuses = CliRunner().invoke(main, ["curate", "check", "--help"]).stdout
    for line in ("0  sound", "1  unsound", "2  usage error", "3  busy", "4  damaged", "5  cannot check"):
        assert line in statuses
    assert CliRunner().invoke(main, ["curate", "check", "--no-such-option"]).exit_code == 2  # click's own


# -- salvage ------------------------------------------------------------------------------------
def rows_of(path: Path, table: str) -> Counter:
    con = duckdb.connect(str(path), read_only=True)
    try:
        return Counter(con.execute(f"SELECT * FROM {table}").fetchall())
    finally:
        con.close()


def readable_by_vector(path: Path) -> int:
    """Trials DuckDB itself reads from ``path``, one vector of 2,048 rows at a time."""
    con = duckdb.connect(str(path), read_only=True)
    try:
        top = con.execute("SELECT max(rowid) FROM trials").fetchone()[0]
        n = 0
        for lo in range(0, top + 1, VECTOR):
            try:
                n += len(con.execute("SELECT * FROM trials WHERE rowid >= ? AND rowid < ?", [lo, lo + VECTOR]).fetchall())
            except duckdb.Error:
                pass
        return n
    finally:
        con.close()


@pytest.mark.parametrize("kind", ["cut short", "middle flipped", "score block flipped", "key block flipped"])
def test_salvage_copies_every_readable_row_and_only_original_rows(files, kind, tmp_path):
    damaged, new = files[kind], tmp_path / "new.duckdb"
    before = sha(damaged)
    result = CliRunner().invoke(main, ["curate", "salvage", str(damaged), str(new)])
    assert result.exit_code == 4, result.output  # written, with losses
    assert sha(damaged) == before
    for table in ("archive_info", "tasks", "profiles", "spaces", "studies"):
        assert rows_of(new, table) == rows_of(files["sound"], table), table  # these read cleanly
    copied, original = rows_of(new, "trials"), rows_of(files["sound"], "trials")
    assert not copied - original  # every copied trial is one of the original's, as many times
    assert sum(copied.values()) == readable_by_vector(damaged) < sum(original.values())
    line = " ".join(next(x for x in result.stdout.splitlines() if x.strip().startswith("trials ")).split())
    assert line.startswith(f"trials {sum(copied.values()):,} of {3 * TRIALS_PER_STUDY:,} rows copied;"), line
    assert "could not be read" in result.stdout and "curate check" in result.stdout
    assert cli(new, "curate", "check").exit_code in (0, 1)  # every block of the new archive reads
    assert [p.name for p in tmp_path.iterdir()] == ["new.duckdb"]  # no staging files left


def test_salvage_per_study_losses_and_json(files, tmp_path):
    result = CliRunner().invoke(main, ["curate", "salvage", str(files["key block flipped"]),
                                       str(tmp_path / "new.duckdb"), "--json"])
    assert result.exit_code == 4
    report = json.loads(result.stdout)
    trials = {t["table"]: t for t in report["tables"]}["trials"]
    assert trials["unreadable_columns"] == ["content_key"] and not report["complete"]
    assert trials["lost"] == sum(n for _, n in trials["lost_by_study"]) == trials["rows"] - trials["copied"] > 0
    assert report["archive_id"] == rows_of(files["sound"], "archive_info").most_common(1)[0][0][0]


def test_salvage_of_a_sound_archive_is_a_complete_copy_that_takes_new_work(files, tmp_path):
    new = tmp_path / "copy.duckdb"
    result = CliRunner().invoke(main, ["curate", "salvage", str(files["small"]), str(new)])
    assert result.exit_code == 0 and "everything was copied" in result.stdout
    theirs, ours = dump_tables(files["small"]), dump_tables(new)
    assert {t: r for t, r in ours.items() if t != "schema_version"} == \
        {t: r for t, r in theirs.items() if t != "schema_version"}
    with Archive(new) as archive:  # id sequences continue after the copied ids
        task = archive.add_task("depot 7", make_data(7), "y", profile={"log_rows": 1.0})
        study = archive.add_study(task, "svm", SPACE, metric="accuracy")
        assert task > max(archive.tasks()["task_id"].iloc[:-1]) and study == 2


def test_salvage_refuses_and_writes_nothing(files, tmp_path):
    exists = tmp_path / "exists.duckdb"
    exists.write_bytes(b"keep me")
    cases = [
        ([files["cut short"], exists], 1, f"{exists}: already exists; salvage writes a new archive and never overwrites"),
        ([files["cut short"], tmp_path / "no" / "dir.duckdb"], 1, "the directory"),
        ([tmp_path / "absent.duckdb", tmp_path / "a.duckdb"], 1, "absent.duckdb: no such file"),
        ([tmp_path, tmp_path / "b.duckdb"], 2, "is a directory"),  # click's own check of the argument
        ([flip(files["small"], tmp_path / "header.duckdb", 4096 + 8), tmp_path / "c.duckdb"], 1,
         "header.duckdb: nothing can be read from it"),
    ]
    for args, code, needle in cases:
        result = CliRunner().invoke(main, ["curate", "salvage", *map(str, args)])
        assert result.exit_code == code and "Traceback" not in result.output, result.output
        assert needle in result.stderr, (needle, result.stderr)
    assert exists.read_bytes() == b"keep me"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["exists.duckdb", "header.duckdb"]


def test_salvage_of_a_file_another_process_writes_waits_for_it(files, held_open, tmp_path):
    held = shutil.copyfile(files["small"], tmp_path / "held.duckdb")
    with held_open(held):
        result = CliRunner().invoke(main, ["curate", "salvage", str(held), str(tmp_path / "new.duckdb")])
    assert result.exit_code == 1
    assert f"{held}: another process is writing to that archive" in result.stderr
    assert not (tmp_path / "new.duckdb").exists()


def test_library_salvage_refuses_a_new_path_that_exists(files, tmp_path):
    with pytest.raises(ArchiveError, match="already exists; salvage writes a new archive"):
        salvage_archive(files["small"], files["sound"])
    with pytest.raises(ArchiveError, match="no such file"):
        salvage_archive(tmp_path / "none.duckdb", tmp_path / "new.duckdb")


@settings(max_examples=8, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(fraction=st.floats(min_value=0.0, max_value=0.999))
def test_any_flipped_spot_salvage_copies_only_original_rows_and_never_fewer_than_duckdb_reads(files, fraction,
                                                                                          tmp_path_factory):
    folder = tmp_path_factory.mktemp("flip")
    damaged = flip(files["sound"], folder / "flipped.duckdb", int(fraction * files["sound"].stat().st_size))
    before = sha(damaged)
    try:
        report = salvage_archive(damaged, folder / "new.duckdb")
    except ArchiveError as exc:  # the headers or the table list: DuckDB cannot read them either
        assert "nothing can be read from it" in str(exc) or "not a DuckDB database" in str(exc), str(exc)
        assert duckdb_reads(damaged, "SELECT * FROM information_schema.tables") != "ok"
        assert not (folder / "new.duckdb").exists() and sha(damaged) == before
        return
    assert sha(damaged) == before
    copied, original = rows_of(folder / "new.duckdb", "trials"), rows_of(files["sound"], "trials")
    assert not copied - original
    trials = {t.table: t for t in report.tables}["trials"]
    assert trials.copied == sum(copied.values()) >= readable_by_vector(damaged)
    assert report.complete == (copied == original and all(t.lost == 0 for t in report.tables))
