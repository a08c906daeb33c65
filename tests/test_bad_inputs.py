"""Bad input, every command: a clear error naming the culprit, no traceback,
and the archive exactly as it was.

Each case below builds one bad input (a space file, a trial file, a dataset,
an archive file from a newer schema or not an archive at all, an export
store, or plain arguments), runs the real command line on it (click's
CliRunner) and checks that the command exits non-zero, prints no traceback,
names the culprit (file, column, row, value or option) in its message, and
leaves the archive identical row for row (an independent canonical dump of
every table, ``dump_tables`` from conftest). Files handed to a command as
another archive are also checked byte for byte. Invented data.
"""

from __future__ import annotations

import hashlib
import json
import shutil
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import duckdb
import numpy as np
import pytest
from conftest import dump_tables
from test_curate import SPACE, cli, make_data, make_trials

from warmstart.archive import Archive
from warmstart.archive.exchange import export_archive


class Files:
    """Good files to start from, and writers for bad ones, in one folder."""

    def __init__(self, root: Path):
        self.root = root
        self.archive = root / "base.duckdb"
        self.space = root / "space.json"
        self.data = root / "data.csv"
        self.trials = root / "trials.csv"
        self.store = root / "store"
        self._n = 0

    def path(self, name: str) -> Path:
        self._n += 1
        folder = self.root / f"case{self._n}"
        folder.mkdir()
        return folder / name

    def text(self, name: str, text: str) -> Path:
        path = self.path(name)
        path.write_text(text, encoding="utf-8")
        return path

    def space_file(self, params: dict, name: str = "space.json") -> Path:
        return self.text(name, json.dumps({"params": params}))

    def trial_file(self, change: Callable, name: str = "trials.csv") -> Path:
        frame = make_trials(1, 5)
        frame["kernel"] = ["rbf", "linear", "rbf", "linear", "rbf"]
        frame["degree"] = np.nan
        frame = change(frame)
        path = self.path(name)
        frame.to_csv(path, index=False)
        return path

    def ingest(self, trials=None, data=None, space=None, target="y", task="new task", extra=()):
        return ["ingest", trials or self.trials, "--task", task, "--data", data or self.data, "--target", target,
                "--learner", "svm", "--space", space or self.space, *extra]

    def duckdb_file(self, sql: list[str], name: str = "other.duckdb") -> Path:
        path = self.path(name)
        con = duckdb.connect(str(path))
        for statement in sql:
            con.execute(statement)
        con.close()
        return path

    def newer_archive(self) -> Path:
        path = self.path("newer.duckdb")
        shutil.copyfile(self.archive, path)
        con = duckdb.connect(str(path))
        con.execute("INSERT INTO schema_version VALUES (99, now(), 'future')")
        con.close()
        return path

    def broken_store(self, breaks: Callable[[Path], None]) -> Path:
        path = self.path("store")
        shutil.copytree(self.store, path)
        breaks(path)
        return path


def _manifest(change: Callable[[dict], None]) -> Callable[[Path], None]:
    def apply(store: Path) -> None:
        manifest = json.loads((store / "manifest.json").read_text())
        change(manifest)
        (store / "manifest.json").write_text(json.dumps(manifest))
    return apply


def _parquet_without_column(store: Path) -> None:
    con = duckdb.connect()
    target = str(store / "spaces.parquet")
    frame = con.execute("SELECT * EXCLUDE (content_hash) FROM read_parquet(?)", [target]).df()
    con.close()
    frame.to_parquet(target)


@dataclass
class Case:
    """One bad input: ``build(files)`` returns the arguments (and maybe another archive)."""

    name: str
    build: Callable
    needles: tuple
    archive: Callable | None = None  # run with --archive this file instead of the base
    exit_codes: tuple = (1,)  # 2: click's own usage errors


def _set(column, value, row=2):
    def change(frame):
        frame = frame.astype({column: object}) if column in frame else frame
        frame.loc[row, column] = value
        return frame
    return change


CASES = [
    # -- space files -------------------------------------------------------------------------
    Case("space low above high", lambda f: f.ingest(space=f.space_file(
        {"n": {"type": "integer", "low": 5, "high": 1}})), ("space.json", "'n'", "low=5 > high=1")),
    Case("space log scale over zero", lambda f: f.ingest(space=f.space_file(
        {"C": {"type": "real", "low": 0, "high": 1, "log": True}})), ("'C'", "log scale", "low > 0")),
    Case("space unknown type", lambda f: f.ingest(space=f.space_file(
        {"C": {"type": "float", "low": 0, "high": 1}})), ("'C'", "'float'", "real, integer, choice")),
    Case("space malformed JSON", lambda f: f.ingest(space=f.text("space.json", '{"params": {')),
         ("space.json", "not a valid JSON")),
    Case("space malformed TOML", lambda f: f.ingest(space=f.text("space.toml", "[params\nC = ")),
         ("space.toml", "not a valid TOML")),
    Case("space unknown key", lambda f: f.ingest(space=f.space_file(
        {"C": {"type": "real", "low": 0, "high": 1, "step": 0.1}})), ("'C'", "unknown key", "step")),
    Case("space condition on nothing", lambda f: f.ingest(space=f.space_file(
        {"a": {"type": "real", "low": 0, "high": 1, "when": {"k": ["x"]}}})), ("'a'", "'k'", "not a parameter")),
    Case("space repeated level", lambda f: f.ingest(space=f.space_file(
        {"k": {"type": "choice", "choices": ["a", "a"]}})), ("'k'", "repeats a level")),
    Case("space wrong extension", lambda f: f.ingest(space=f.text("space.yaml", "params: {}")),
         ("space.yaml", ".json or .toml")),
    Case("space missing file", lambda f: f.ingest(space=f.root / "nowhere.json"),
         ("nowhere.json", "cannot read space file")),
    Case("space without parameters", lambda f: f.ingest(space=f.space_file({})), ("space.json", "'params'")),
    Case("space choice with bounds", lambda f: f.ingest(space=f.space_file(
        {"k": {"type": "choice", "choices": [1, 2], "low": 0}})), ("'k'", "takes 'choices' only")),
    # -- trial files ---------------------------------------------------------------------------
    Case("trials unknown column", lambda f: f.ingest(trials=f.trial_file(lambda t: t.assign(gamma=1.0))),
         ("trials.csv", "unknown column", "gamma")),
    Case("trials missing column", lambda f: f.ingest(trials=f.trial_file(lambda t: t.drop(columns="tol"))),
         ("trials.csv", "missing column", "tol")),
    Case("trials value out of range", lambda f: f.ingest(trials=f.trial_file(_set("C", 5000.0))),
         ("trials.csv", "row 3", "'C'", "5000", "out of range")),
    Case("trials text in a number column", lambda f: f.ingest(trials=f.trial_file(_set("tol", "abc"))),
         ("trials.csv", "'tol'", "'abc'", "not a number")),
    Case("trials fraction for an integer", lambda f: f.ingest(trials=f.trial_file(_set("depth", 2.5))),
         ("trials.csv", "'depth'", "2.5", "whole number")),
    Case("trials unknown level", lambda f: f.ingest(trials=f.trial_file(_set("kernel", "sigmoid"))),
         ("trials.csv", "'kernel'", "sigmoid", "not allowed")),
    Case("trials bad status", lambda f: f.ingest(trials=f.trial_file(lambda t: t.assign(status="maybe"))),
         ("trials.csv", "'status'", "maybe", "not a status")),
    Case("trials bad date", lambda f: f.ingest(trials=f.trial_file(lambda t: t.assign(started_at="yesterday"))),
         ("trials.csv", "'started_at'", "yesterday", "not a date-time")),
    Case("trials negative cost", lambda f: f.ingest(trials=f.trial_file(lambda t: t.assign(cost_s=-1.0))),
         ("trials.csv", "'cost_s'", "-1", "cost in seconds")),
    Case("trials infinite value", lambda f: f.ingest(trials=f.trial_file(_set("C", float("inf")))),
         ("trials.csv", "'C'", "not finite")),
    Case("trials active conditional left empty", lambda f: f.ingest(trials=f.trial_file(_set("kernel", "poly"))),
         ("trials.csv", "row 3", "'degree'", "active")),
    Case("trials no score column", lambda f: f.ingest(trials=f.trial_file(lambda t: t.drop(columns="score"))),
         ("trials.csv", "no 'score' column")),
    Case("trials empty file", lambda f: f.ingest(trials=f.text("trials.csv", "")), ("trials.csv", "empty")),
    Case("trials header only", lambda f: f.ingest(trials=f.text("trials.csv", "C,tol,score\n")),
         ("trials.csv", "no rows")),
    Case("trials broken Parquet", lambda f: f.ingest(trials=f.text("trials.parquet", "PAR1 not really")),
         ("trials.parquet", "not a valid Parquet")),
    Case("trials broken JSON lines", lambda f: f.ingest(trials=f.text("trials.jsonl", '{"C": 1.0,\n')),
         ("trials.jsonl", "not a valid JSON lines")),
    Case("trials unknown format", lambda f: f.ingest(trials=f.text("trials.xlsx", "x")),
         ("trials.xlsx", "cannot tell the format")),
    Case("trials missing file", lambda f: f.ingest(trials=f.root / "gone.csv"), ("gone.csv", "no such file")),
    # -- datasets ----------------------------------------------------------------------------------
    Case("data without the target", lambda f: f.ingest(target="churned"), ("data.csv", "'churned'", "not found")),
    Case("data missing file", lambda f: f.ingest(data=f.root / "gone_data.csv"), ("gone_data.csv", "no such file")),
    Case("data empty file", lambda f: f.ingest(data=f.text("data.csv", "")), ("data.csv", "empty")),
    Case("task name taken by other data", lambda f: f.ingest(task="churn", data=_other_data(f)),
         ("'churn'", "different data", "choose another task name")),
    Case("ingest bad tag", lambda f: f.ingest(extra=["--tag", "novalue"]), ("novalue", "KEY=VALUE"), exit_codes=(2,)),
    # -- archive files ------------------------------------------------------------------------------
    Case("archive not a database", lambda f: ["studies"], ("junk.duckdb", "not a warmstart archive"),
         archive=lambda f: f.text("junk.duckdb", "hello, not a database")),
    # `curate check` exits 5 when it cannot check at all (its documented statuses: 1 is "unsound")
    Case("archive a database but no archive", lambda f: ["curate", "check"], ("plain.duckdb", "not a warmstart archive"),
         archive=lambda f: f.duckdb_file(["CREATE TABLE sales (x INTEGER)"], "plain.duckdb"), exit_codes=(5,)),
    Case("archive from a newer schema (read)", lambda f: ["studies"], ("newer.duckdb", "schema version 99", "upgrade"),
         archive=lambda f: f.newer_archive()),
    Case("archive from a newer schema (write)", lambda f: ["curate", "check", "--fix"],
         ("newer.duckdb", "newer than this warmstart"), archive=lambda f: f.newer_archive(), exit_codes=(5,)),
    Case("archive is a directory", lambda f: ["curate", "dedupe"], ("is a directory",),
         archive=lambda f: f.path("folder").parent),
    Case("archive missing (read-only)", lambda f: ["curate", "check"], ("nothing.duckdb", "no archive here"),
         archive=lambda f: f.root / "nothing.duckdb", exit_codes=(5,)),
    # -- merge ---------------------------------------------------------------------------------------
    Case("merge missing file", lambda f: ["curate", "merge", f.root / "absent.duckdb"],
         ("absent.duckdb", "no such file")),
    Case("merge not a database", lambda f: ["curate", "merge", f.text("mate.duckdb", "text")],
         ("mate.duckdb", "not a warmstart archive")),
    Case("merge a database but no archive", lambda f: ["curate", "merge", f.duckdb_file(["CREATE TABLE t (x INT)"])],
         ("other.duckdb", "not a warmstart archive")),
    Case("merge a newer schema", lambda f: ["curate", "merge", f.newer_archive()],
         ("newer.duckdb", "schema version 99", "newer")),
    Case("merge the archive itself", lambda f: ["curate", "merge", f.archive], ("base.duckdb", "this archive itself")),
    Case("merge a directory", lambda f: ["curate", "merge", f.store], ("store", "is a directory", "curate import")),
    # -- import --------------------------------------------------------------------------------------
    Case("import missing directory", lambda f: ["curate", "import", f.root / "no_store"],
         ("no_store", "no such directory")),
    Case("import a file", lambda f: ["curate", "import", f.space], ("space.json", "is a file")),
    Case("import without manifest", lambda f: ["curate", "import", f.broken_store(
        lambda s: (s / "manifest.json").unlink())], ("store", "no manifest.json")),
    Case("import manifest not JSON", lambda f: ["curate", "import", f.broken_store(
        lambda s: (s / "manifest.json").write_text("{oops"))], ("manifest.json", "not valid JSON")),
    Case("import manifest from a newer schema", lambda f: ["curate", "import", f.broken_store(
        _manifest(lambda m: m.update(schema_version=7)))], ("manifest.json", "schema version 7", "upgrade")),
    Case("import manifest of something else", lambda f: ["curate", "import", f.broken_store(
        _manifest(lambda m: m.update(format="spreadsheet")))], ("manifest.json", "'spreadsheet'")),
    Case("import manifest without counts", lambda f: ["curate", "import", f.broken_store(
        _manifest(lambda m: m.pop("counts")))], ("manifest.json", "counts")),
    Case("import missing table file", lambda f: ["curate", "import", f.broken_store(
        lambda s: (s / "tasks.parquet").unlink())], ("tasks.parquet", "missing")),
    Case("import broken table file", lambda f: ["curate", "import", f.broken_store(
        lambda s: (s / "studies.parquet").write_bytes(b"PAR1 broken"))], ("studies.parquet", "not a readable Parquet")),
    Case("import fewer trials than the manifest", lambda f: ["curate", "import", f.broken_store(
        _manifest(lambda m: m["counts"].update(trials=m["counts"]["trials"] + 1)))],
         ("trials", "the manifest says", "incomplete")),
    Case("import table without a column", lambda f: ["curate", "import", f.broken_store(_parquet_without_column)],
         ("spaces.parquet", "content_hash")),
    # -- export --------------------------------------------------------------------------------------
    Case("export into a used directory", lambda f: ["curate", "export", f.text("notes.txt", "mine").parent],
         ("already exists", "never overwrites")),
    Case("export onto a file", lambda f: ["curate", "export", f.space], ("space.json", "already exists")),
    # -- arguments -----------------------------------------------------------------------------------
    Case("show unknown study", lambda f: ["show", "999"], ("999", "no study with id")),
    Case("show a study that is not a number", lambda f: ["show", "first"], ("'first'", "not a valid integer"),
         exit_codes=(2,)),
    Case("tag unknown study", lambda f: ["tag", "999", "k=v"], ("999", "no study with id")),
    Case("tag without equals", lambda f: ["tag", "1", "retail"], ("'retail'", "KEY=VALUE"), exit_codes=(2,)),
    Case("tag with an empty key", lambda f: ["tag", "1", "=north"], ("'=north'", "empty key"), exit_codes=(2,)),
    Case("tag with nothing to do", lambda f: ["tag", "1"], ("KEY=VALUE", "--owner"), exit_codes=(2,)),
    Case("tag removing an unknown key", lambda f: ["tag", "1", "--remove", "season"], ("'season'", "has no tag")),
    Case("prune without a filter", lambda f: ["curate", "prune", "--yes"], ("say what to prune",)),
    Case("prune before a non-date", lambda f: ["curate", "prune", "--before", "last tuesday", "--yes"],
         ("'last tuesday'", "not a date")),
    Case("prune bad tag", lambda f: ["curate", "prune", "--tag", "team", "--yes"], ("'team'", "KEY=VALUE"),
         exit_codes=(2,)),
    Case("studies bad tag filter", lambda f: ["studies", "--tag", "x"], ("'x'", "KEY=VALUE"), exit_codes=(2,)),
]


def _other_data(f: Files) -> Path:
    path = f.path("other_data.csv")
    make_data(2).to_csv(path, index=False)
    return path


@pytest.fixture(scope="module")
def files(tmp_path_factory) -> Files:
    f = Files(tmp_path_factory.mktemp("bad"))
    SPACE.save(f.space)
    make_data(1).to_csv(f.data, index=False)
    make_trials(1, 5).to_csv(f.trials, index=False)
    with Archive(f.archive) as archive:
        task = archive.add_task("churn", make_data(1), "y", profile={"log_rows": 1.0})
        study = archive.add_study(task, "svm", SPACE, owner="ana", tags={"team": "retail"})
        archive.add_trials(study, make_trials(1, 5))
        export_archive(archive, f.store)
    f.baseline = dump_tables(f.archive)
    return f


def _sha(path: Path) -> str | None:
    return hashlib.sha256(path.read_bytes()).hexdigest() if path.is_file() else None


def test_there_are_at_least_40_distinct_bad_inputs():
    assert len({case.name for case in CASES}) == len(CASES) >= 40


@pytest.mark.parametrize("case", CASES, ids=[c.name for c in CASES])
def test_bad_input_is_named_and_changes_nothing(files, case):
    archive = case.archive(files) if case.archive else files.archive
    args = case.build(files)
    watched = [Path(a) for a in args if isinstance(a, Path) and a.is_file() and a.suffix == ".duckdb"]
    watched.append(Path(archive))
    before = {p: _sha(p) for p in watched}
    result = cli(archive, *args)
    assert result.exit_code in case.exit_codes, (result.exit_code, result.output)
    assert result.exception is None or isinstance(result.exception, SystemExit), repr(result.exception)
    assert "Traceback" not in result.output
    for needle in case.needles:
        assert needle in result.stderr, f"{needle!r} not in: {result.stderr}"
    assert dump_tables(files.archive) == files.baseline
    for path, sha in before.items():
        if path != files.archive:
            assert _sha(path) == sha, f"{path} was modified"
