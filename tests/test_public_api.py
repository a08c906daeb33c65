"""The public face: DESIGN.md section 8 keeps working, every public name is
documented, and ``import warmstart`` stays light."""

from __future__ import annotations

import inspect
import subprocess
import sys

import numpy as np
import pandas as pd
import pytest
from sklearn.datasets import load_breast_cancer, load_iris, load_wine

import warmstart

# The contract's space: C and gamma of an RBF support-vector machine on a log scale
# (the libsvm guide's grid bounds, from memory).
SPACE = {"params": {
    "C": {"type": "real", "low": 2.0**-5, "high": 2.0**15, "log": True},
    "gamma": {"type": "real", "low": 2.0**-15, "high": 2.0**3, "log": True},
}}


def _frame(loader) -> pd.DataFrame:
    data = loader(as_frame=True)
    frame = data.frame.copy()
    frame = frame.rename(columns={"target": "label"})
    return frame


def _trials(best_c: float, best_gamma: float, rng: np.random.Generator, n: int = 24) -> pd.DataFrame:
    """Configs scored by closeness (in log space) to a known best config."""
    c = np.exp(rng.uniform(np.log(2.0**-5), np.log(2.0**15), n))
    g = np.exp(rng.uniform(np.log(2.0**-15), np.log(2.0**3), n))
    squared = (np.log2(c) - np.log2(best_c)) ** 2 + (np.log2(g) - np.log2(best_gamma)) ** 2
    score = 1.0 / (1.0 + squared / 20.0)  # in (0, 1], as a balanced accuracy is
    return pd.DataFrame({"C": c, "gamma": g, "score": score})


def test_public_names_are_few_and_documented():
    assert len(warmstart.__all__) <= 45  # issue 15: "at most about 40"
    for name in warmstart.__all__:
        if name in ("__version__", "PROFILE_VERSION"):
            continue
        obj = getattr(warmstart, name)
        assert inspect.getdoc(obj), f"warmstart.{name} has no docstring"


def test_unknown_name_is_an_attribute_error():
    with pytest.raises(AttributeError, match="no attribute 'nope'"):
        warmstart.nope  # noqa: B018


def test_import_loads_no_heavy_library():
    # `warmstart --version` and the package face import neither pandas nor SciPy
    # (issue 17: every command paid for them); checked in a fresh interpreter.
    code = "import sys, warmstart; print(sorted(m for m in ('pandas', 'scipy', 'sklearn', 'duckdb') if m in sys.modules))"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip() == "[]"


def test_design_contract_end_to_end(tmp_path):
    """DESIGN.md section 8, line by line, on datasets bundled with scikit-learn."""
    space = warmstart.Space.from_dict(SPACE)
    archive = warmstart.Archive(str(tmp_path / "contract.duckdb"))
    rng = np.random.default_rng(0)
    # two past tasks with known best configs, far apart in the space
    best = {"iris": (2.0**10, 2.0**-10), "wine": (2.0**-2, 2.0**1)}
    for name, loader in (("iris", load_iris), ("wine", load_wine)):
        task = archive.add_task(name, _frame(loader), target="label")
        study = archive.add_study(task, learner="svm", space=space, metric="balanced_accuracy", maximize=True)
        archive.add_trials(study, _trials(*best[name], rng))
    assert len(archive.studies()) == 2

    # a new task that is iris again (rows reversed): its profile is nearest iris
    new = _frame(load_iris).iloc[::-1].reset_index(drop=True)
    prof = warmstart.profile(new, target="label")
    assert all(np.isfinite(v) for v in prof.values())
    near = archive.neighbors(prof, learner="svm", k=5)
    assert list(near["task"])[0] == "iris"

    prior = archive.build_prior(prof, learner="svm", space=space)
    assert isinstance(prior, warmstart.Prior)
    search = warmstart.DensitySearch(space, prior=prior, seed=0, maximize=True)
    first = search.propose()
    space.validate(first)
    # the first proposal comes from the nearer task's good region (within 3 octaves per parameter)
    assert abs(np.log2(first["C"]) - 10) < 3 and abs(np.log2(first["gamma"]) + 10) < 3
    search.record(first, 0.9)

    # a task of another kind (regression would not compare); a third classification task joins
    task = archive.add_task("breast cancer", _frame(load_breast_cancer), target="label")
    assert task > 0


def test_every_command_is_in_the_lazy_table():
    # cli.main.COMMAND_MODULES maps each command to the module that defines it;
    # importing every command module must register exactly those names.
    import importlib

    from warmstart.cli.main import COMMAND_MODULES, main

    for module in set(COMMAND_MODULES.values()):
        importlib.import_module(f"warmstart.cli.{module}")
    assert set(main.commands) == set(COMMAND_MODULES)


def test_version_loads_no_command_module():
    code = ("import sys\nfrom warmstart.cli import main\ntry:\n    main(['--version'])\nexcept SystemExit:\n    pass\n"
            "print(sorted(m for m in sys.modules if m.startswith('warmstart.cli.') and m.endswith('_cmds')),"
            " 'pandas' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip().splitlines()[-1] == "[] False"
