"""The demo command runs the whole job end to end (small settings) and says the
scenario is invented."""

import pandas as pd
from click.testing import CliRunner

from warmstart.cli import main
from warmstart.demo import store_table, store_traits


def test_store_tables_are_reproducible_and_fit_for_profiling():
    a = store_table(store_traits(3, 7), 7)
    b = store_table(store_traits(3, 7), 7)
    pd.testing.assert_frame_equal(a, b)
    assert set(a["lapsed"].unique()) == {0, 1}
    assert a["basket_eur"].isna().any()  # a few holes, like a real export
    assert not store_table(store_traits(4, 7), 7).equals(a)


def test_demo_runs_end_to_end(tmp_path):
    out = tmp_path / "demo"
    res = CliRunner().invoke(main, ["demo", "--out", str(out), "--stores", "4", "--configs", "20", "--budget", "4",
                                    "--repeats", "2", "--workers", "1"])
    assert res.exit_code == 0, res.output
    text = res.stdout
    assert "invented" in text
    for step in ("1. Building a tuning history", "3. Its nearest past stores", "4. The prior built from them",
                 "gain of warm over cold", "6. Does transfer help"):
        assert step in text
    # a bit is explained once, in plain words, before the first figures in bits
    assert text.count("+1 bit = twice as likely per query") == 1
    assert text.index("+1 bit = twice") < text.index("warm: ")
    # the neighbors: a header, a rule and one aligned line per store (numbers right-aligned)
    lines = text.splitlines()
    head = lines.index(next(line for line in lines if line.startswith("3. Its nearest past stores"))) + 1
    table = lines[head:head + 2 + 4]  # 4 history stores
    assert table[0].split() == ["store", "distance", "similarity", "best"]
    assert set(table[1].strip()) == {"-", " "}
    assert len({len(line) for line in table}) == 1, table  # every column lines up
    # the prior's figures come with their meaning
    assert "effective: the studies' weights count as much as" in text and "strength n0 = effective x" in text
    html = (out / "report.html").read_text()
    assert html.count("<img") >= 4 and "Larkspur" in html
    assert ">None<" not in html and ">nan<" not in html.lower()  # missing cells show a dash
    assert (out / "demo.duckdb").exists()
    # the command hands its progress bars to the demo: one per long step, on stderr
    for bar in ("  history [", "  live [", "  replay ["):
        assert bar in res.stderr


def test_only_the_command_line_imports_click():
    # the one-way rule: library modules print and draw progress through what their caller passes
    import ast
    from pathlib import Path

    import warmstart

    root = Path(warmstart.__file__).parent
    offenders = []
    for path in root.rglob("*.py"):
        if path.relative_to(root).parts[0] == "cli":
            continue
        for node in ast.walk(ast.parse(path.read_text())):
            names = [a.name for a in node.names] if isinstance(node, ast.Import) else \
                [node.module or ""] if isinstance(node, ast.ImportFrom) else []
            if any(n == "click" or n.startswith("click.") for n in names):
                offenders.append(str(path.relative_to(root)))
    assert offenders == []


def test_demo_refuses_a_budget_above_its_configs_before_any_work(tmp_path):
    # the replay step evaluates each recorded config of a store at most once per run
    res = CliRunner().invoke(main, ["demo", "--out", str(tmp_path / "demo"), "--configs", "20", "--budget", "21"])
    assert res.exit_code == 2 and "Traceback" not in res.output
    assert "21 is above --configs 20" in res.stderr and "--budget 20 or less" in res.stderr
    assert not (tmp_path / "demo").exists()
