"""Search spaces: encoding round trips, alignment, files, sampling and validation."""

from __future__ import annotations

import json
import math
import tempfile
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy import stats
from scipy.stats import qmc

from warmstart.errors import SpaceError, WarmstartError
from warmstart.space import KINDS, Space

# -- strategies --------------------------------------------------------------

NAME_CHARS = st.characters(blacklist_categories=("Cs",))  # any text a file can hold
NAMES = st.text(NAME_CHARS, min_size=1, max_size=6)
LEVELS = st.one_of(
    st.text(NAME_CHARS, max_size=5),
    st.integers(-(2**53), 2**53),
    st.floats(allow_nan=False, allow_infinity=False),
    st.booleans(),
)


def level_key(value):
    """Levels are distinct by meaning: 1 == 1.0, but True is not 1."""
    if isinstance(value, bool):
        return ("bool", value)
    if isinstance(value, (int, float)):
        return ("num", float(value))
    return ("str", value)


@st.composite
def param_specs(draw, kind):
    if kind == "real":
        if draw(st.booleans()):
            low = draw(st.floats(1e-8, 1e4))
            return {"type": "real", "low": low, "high": low * draw(st.floats(1.001, 1e8)), "log": True}
        low = draw(st.floats(-1e6, 1e6))
        return {"type": "real", "low": low, "high": low + draw(st.floats(1e-3, 1e6))}
    if kind == "integer":
        if draw(st.booleans()):
            low = draw(st.integers(1, 1000))
            return {"type": "integer", "low": low, "high": low + draw(st.integers(0, 10_000)), "log": True}
        low = draw(st.integers(-1000, 1000))
        return {"type": "integer", "low": low, "high": low + draw(st.integers(0, 1000))}
    return {"type": "choice", "choices": draw(st.lists(LEVELS, min_size=1, max_size=5, unique_by=level_key))}


@st.composite
def space_dicts(draw, names=NAMES, max_params=5):
    """Random valid space definitions with every kind, log scales and conditions
    (a parameter may depend on up to two earlier choice parameters)."""
    chosen = draw(st.lists(names, min_size=1, max_size=max_params, unique=True))
    params: dict = {}
    choices: list[str] = []
    for name in chosen:
        spec = draw(param_specs(draw(st.sampled_from(KINDS))))
        parents = draw(st.lists(st.sampled_from(choices), max_size=2, unique=True)) if choices else []
        if parents:
            spec["when"] = {
                parent: draw(st.lists(st.sampled_from(params[parent]["choices"]), min_size=1, unique_by=level_key))
                for parent in parents
            }
        if spec["type"] == "choice":
            choices.append(name)
        params[name] = spec
    return {"params": params}


spaces = space_dicts().map(Space.from_dict)


@st.composite
def space_and_config(draw, space_strategy=spaces):
    space = draw(space_strategy)
    return space, draw(configs(space))


@st.composite
def configs(draw, space):
    """A valid config: parents are drawn before the parameters they switch on."""
    config: dict = {}
    for p in space.params:
        if not space.is_active(config, p.name):
            continue
        if p.kind == "real":
            config[p.name] = draw(st.floats(p.low, p.high))
        elif p.kind == "integer":
            config[p.name] = draw(st.integers(p.low, p.high))
        else:
            config[p.name] = draw(st.sampled_from(p.choices))
    return config


def assert_same_config(space: Space, got: dict, want: dict) -> None:
    """Same keys; integers and levels exactly (same type), reals within 1e-9 relative
    (for a linear scale, relative to the width of the range: the encoding is affine)."""
    assert list(got) == [name for name in space.names if name in want]
    for name, value in want.items():
        p, g = space[name], got[name]
        if p.kind == "real":
            assert type(g) is float
            abs_tol = 0.0 if p.log else 1e-9 * (p.high - p.low)
            assert math.isclose(g, value, rel_tol=1e-9, abs_tol=abs_tol), (name, g, value)
        else:
            assert type(g) is type(value) and g == value, (name, g, value)


# -- encoding ----------------------------------------------------------------


@settings(max_examples=150, deadline=None)
@given(space_and_config())
def test_decode_encode_round_trip(pair):
    space, config = pair
    space.validate(config)
    X = space.encode([config])
    assert X.shape == (1, space.dim)
    for j, p in enumerate(space.params):
        x = X[0, j]
        if p.name not in config:
            assert np.isnan(x)  # inactive: marked, not imputed
        elif p.kind == "choice":
            assert x == p.level_index(config[p.name])
        else:
            assert 0.0 <= x <= 1.0
    back = space.decode(X)[0]
    assert_same_config(space, back, config)
    space.validate(back)
    # encoding the decoded config gives the same row (integers sit at cell centres)
    np.testing.assert_allclose(space.encode([back]), X, rtol=0, atol=1e-12)


def test_round_trip_every_integer_of_a_log_scale():
    space = Space.from_dict({"params": {"n": {"type": "integer", "low": 1, "high": 5000, "log": True}}})
    values = list(range(1, 5001))
    back = space.decode(space.encode([{"n": v} for v in values]))
    assert [c["n"] for c in back] == values


@pytest.mark.parametrize("spec", [
    {"type": "integer", "low": -3, "high": 4},
    {"type": "integer", "low": 1, "high": 30, "log": True},
    {"type": "integer", "low": 7, "high": 7},
])
def test_each_integer_owns_its_cell_of_the_unit_interval(spec):
    # analytic: on a linear scale integer v owns [v - 1/2, v + 1/2] mapped affinely onto [0, 1];
    # on a log scale it owns [log(v - 1/2), log(v + 1/2)] mapped affinely onto [0, 1]
    p = Space.from_dict({"params": {"n": spec}})["n"]
    scale = np.log if spec.get("log") else (lambda x: x)
    lo, hi = scale(p.low - 0.5), scale(p.high + 0.5)
    for v in range(p.low, p.high + 1):
        left, right = (scale(v - 0.5) - lo) / (hi - lo), (scale(v + 0.5) - lo) / (hi - lo)
        inside = np.array([left + 1e-9, (left + right) / 2, right - 1e-9])
        assert p.from_unit(inside).tolist() == [v, v, v]
        assert left <= p.to_unit(np.array([v]))[0] <= right
        if v > p.low:
            assert p.from_unit(np.array([left - 1e-9]))[0] == v - 1


def test_encode_example_values(space):
    config = {"C": 1.0, "tol": 0.25, "n_trees": 100, "depth": 1, "kernel": "poly", "degree": 5}
    X = space.encode([config])[0]
    # analytic: log10(1) is the middle of [-3, 3]; 0.25 is the middle of [0, 0.5]
    assert X[0] == pytest.approx(0.5)
    assert X[1] == pytest.approx(0.5)
    # integers at their cell centre: 1 is the first of 8 cells, 5 the last of 4
    assert X[3] == pytest.approx(0.5 / 8)
    assert X[5] == pytest.approx(3.5 / 4)
    # log integer cell [99.5, 100.5] of [9.5, 1000.5] in log space (analytic)
    centre = 0.5 * (math.log(99.5) + math.log(100.5))
    assert X[2] == pytest.approx((centre - math.log(9.5)) / (math.log(1000.5) - math.log(9.5)))
    assert X[4] == 1.0  # level index of "poly"


@settings(max_examples=100, deadline=None)
@given(space_and_config())
def test_canonical_json_independent_of_key_order(pair):
    space, config = pair
    reordered = dict(reversed(list(config.items())))
    text = space.canonical_json(config)
    assert text == space.canonical_json(reordered)
    assert json.loads(text) == space.normalize(config)


# -- alignment ---------------------------------------------------------------

POOL = st.sampled_from(["a", "b", "c", "d", "e"])
ODD_VALUES = st.one_of(
    st.none(), st.booleans(), st.integers(-(10**6), 10**6), st.floats(), st.text(max_size=4), LEVELS
)


def assert_aligned_valid(space: Space, aligned) -> None:
    config = aligned.config
    for name, value in config.items():
        assert space.check_value(name, value) == value  # a valid value of that parameter
        assert space.is_active(config, name)  # and active given the others
    expected_missing = {p.name for p in space.params if p.name not in config and space.is_active(config, p.name)}
    assert set(aligned.missing) == expected_missing
    for name in aligned.clipped:
        assert config[name] in (space[name].low, space[name].high)
    completed = space.complete(config, rng=0)
    space.validate(completed)
    assert {k: completed[k] for k in config} == config  # present values are kept


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.data())
def test_align_between_random_spaces_gives_valid_configs(data):
    source, config = data.draw(space_and_config(space_dicts(names=POOL).map(Space.from_dict)))
    target = data.draw(space_dicts(names=POOL).map(Space.from_dict))
    assert_aligned_valid(target, target.align(config, from_space=source))


@settings(max_examples=150, deadline=None)
@given(spaces, st.dictionaries(st.one_of(POOL, NAMES), ODD_VALUES, max_size=6))
def test_align_of_arbitrary_values_gives_valid_configs(target, config):
    assert_aligned_valid(target, target.align(config))


@settings(max_examples=100, deadline=None)
@given(space_and_config())
def test_align_onto_the_same_space_is_exact(pair):
    space, config = pair
    aligned = space.align(config, from_space=space)
    assert aligned.exact
    assert aligned.config == space.normalize(config)


def test_align_reports_clipped_dropped_missing(space):
    old = Space.from_dict({"params": {
        "C": {"type": "real", "low": 1e-5, "high": 1e5, "log": True},
        "depth": {"type": "real", "low": 0.0, "high": 20.0},
        "kernel": {"type": "choice", "choices": ["rbf", "sigmoid", "poly"]},
        "gamma": {"type": "real", "low": 0.0, "high": 1.0},
    }})
    aligned = space.align({"C": 1e5, "depth": 3.6, "kernel": "sigmoid", "gamma": 0.5}, from_space=old)
    assert aligned.config == {"C": 1000.0, "depth": 4}  # C clipped to high, depth rounded
    assert aligned.clipped == ("C",)
    assert set(aligned.dropped) == {"kernel", "gamma"}  # level unknown here / no such parameter
    assert set(aligned.missing) == {"tol", "n_trees", "kernel"}
    aligned = space.align({"kernel": "rbf", "degree": 3, "depth": 99})
    assert "degree" in aligned.dropped  # inactive for rbf
    assert aligned.config["depth"] == 8 and aligned.clipped == ("depth",)


# -- files and hashes --------------------------------------------------------


@settings(max_examples=80, deadline=None)
@given(spaces)
def test_space_file_round_trip_json_and_toml(space):
    with tempfile.TemporaryDirectory() as folder:
        for name in ("space.json", "space.toml"):
            path = Path(folder) / name
            space.save(path)
            loaded = Space.load(path)
            assert loaded == space
            assert loaded.names == space.names  # order kept: it is the coordinate order
            assert loaded.to_dict() == space.to_dict()
            assert loaded.content_hash == space.content_hash
            for p, q in zip(space.params, loaded.params):  # level types survive (1 vs 1.0 vs True)
                assert [type(c) for c in p.choices] == [type(c) for c in q.choices]


@settings(max_examples=100, deadline=None)
@given(space_dicts(), st.randoms(use_true_random=False))
def test_content_hash_independent_of_order(d, random):
    items = list(d["params"].items())
    random.shuffle(items)
    shuffled = {"params": {}}
    for name, spec in items:
        spec = dict(reversed(list(spec.items())))  # key order inside a parameter too
        if "when" in spec:
            spec["when"] = dict(reversed(list(spec["when"].items())))
        shuffled["params"][name] = spec
    assert Space.from_dict(shuffled).content_hash == Space.from_dict(d).content_hash


def test_content_hash_changes_with_the_definition(space_dict):
    base = Space.from_dict(space_dict).content_hash
    space_dict["params"]["tol"]["high"] = 0.6
    assert Space.from_dict(space_dict).content_hash != base
    space_dict["params"]["tol"]["high"] = 0.5
    space_dict["params"]["kernel"]["choices"] = ["poly", "rbf", "linear"]  # level order is the encoding
    assert Space.from_dict(space_dict).content_hash != base


def test_space_toml_file(tmp_path):
    path = tmp_path / "svm.toml"
    path.write_text(
        '[params.C]\ntype = "real"\nlow = 0.001\nhigh = 1000.0\nlog = true\n\n'
        '[params.kernel]\ntype = "choice"\nchoices = ["rbf", "poly"]\n\n'
        '[params.degree]\ntype = "integer"\nlow = 2\nhigh = 5\nwhen = { kernel = ["poly"] }\n'
    )
    space = Space.load(path)
    assert space.names == ["C", "kernel", "degree"]
    assert space["degree"].when == (("kernel", ("poly",)),)


@pytest.mark.parametrize(
    "name, text, match",
    [
        ("s.toml", "[params.C\ntype = 1", r"s\.toml: not a valid TOML file"),
        ("s.json", "{not json", r"s\.json: not a valid JSON file"),
        ("s.yaml", "params: {}", r"s\.yaml: space files must end in \.json or \.toml, got '\.yaml'"),
        ("s.json", '{"params": {"C": {"type": "real", "low": 1, "high": 0}}}', r"s\.json: parameter 'C' has low=1\.0"),
    ],
)
def test_space_load_errors_name_the_file(tmp_path, name, text, match):
    path = tmp_path / name
    path.write_text(text)
    with pytest.raises(SpaceError, match=match):
        Space.load(path)


def test_space_load_missing_file(tmp_path):
    with pytest.raises(SpaceError, match=r"nope\.toml: cannot read space file"):
        Space.load(tmp_path / "nope.toml")


def test_space_save_wrong_extension(tmp_path, space):
    with pytest.raises(SpaceError, match=r"must end in \.json or \.toml, got '\.txt'"):
        space.save(tmp_path / "s.txt")


# -- sampling ----------------------------------------------------------------


@pytest.mark.parametrize("n, seed", [(1, 0), (5, 1), (16, 2), (100, 3)])
def test_sobol_matches_scipy(space, n, seed):
    # reference: scipy.stats.qmc.Sobol(scramble=True, rng=...).random_base2
    m = math.ceil(math.log2(n)) if n > 1 else 0
    reference = qmc.Sobol(d=space.dim, scramble=True, rng=np.random.default_rng(seed)).random_base2(m)[:n]
    got = space.sobol_unit(n, rng=seed)
    np.testing.assert_array_equal(got, space.from_unit(reference))
    # coordinates of the linear real are the Sobol coordinates themselves
    np.testing.assert_allclose(got[:, 1], reference[:, 1], rtol=0, atol=1e-15)
    # a choice takes level floor(u * k)
    np.testing.assert_array_equal(got[:, 4], np.floor(reference[:, 4] * 3))
    assert space.sobol(n, rng=seed) == space.decode(got)


def test_sobol_is_stratified_in_each_coordinate():
    # reference: a scrambled Sobol sequence is a (t, m, s)-net in base 2 whose one-dimensional
    # projections put exactly one point in each of the 2**m intervals [i/2**m, (i+1)/2**m)
    space = Space.from_dict({"params": {
        "k": {"type": "choice", "choices": ["a", "b", "c", "d"]},
        "n": {"type": "integer", "low": 0, "high": 7},
    }})
    X = space.sobol_unit(32, rng=5)
    assert np.bincount(X[:, 0].astype(int), minlength=4).tolist() == [8] * 4
    values = [c["n"] for c in space.decode(X)]
    assert np.bincount(values, minlength=8).tolist() == [4] * 8


def test_uniform_sampling_is_uniform(space):
    n = 4000
    X = space.sample_unit(n, rng=11)
    configs = space.decode(X)
    # reals: encoded coordinates uniform on [0, 1]; reference: scipy.stats.kstest
    for j in (0, 1):
        assert stats.kstest(X[:, j], "uniform").pvalue > 1e-3
    # the log real is log-uniform in value; reference: scipy.stats.loguniform
    C = np.array([c["C"] for c in configs])
    assert stats.kstest(C, stats.loguniform(1e-3, 1e3).cdf).pvalue > 1e-3
    # a linear integer: every value an equal share; reference: scipy.stats.chisquare
    depth = np.bincount([c["depth"] for c in configs], minlength=9)[1:]
    assert stats.chisquare(depth).pvalue > 1e-3
    # a log integer: each value's share is the log-width of its cell [v - 1/2, v + 1/2] (analytic)
    values = np.arange(10, 1001)
    share = np.log((values + 0.5) / (values - 0.5)) / np.log(1000.5 / 9.5)
    counts = np.bincount([c["n_trees"] for c in configs], minlength=1001)[10:]
    # pool the sparse tail into blocks of about 40 expected draws each (chi-square needs them)
    starts = np.unique(np.r_[0, np.searchsorted(np.cumsum(share * n), np.arange(40, n, 40))])
    starts = starts[starts < len(values)]
    obs, exp = np.add.reduceat(counts, starts), np.add.reduceat(share * n, starts)
    assert exp.sum() == pytest.approx(n) and exp.min() > 5
    assert stats.chisquare(obs, exp).pvalue > 1e-3
    # a choice: equal shares; the conditional degree only where kernel == "poly"
    kernels = np.bincount(X[:, 4].astype(int), minlength=3)
    assert stats.chisquare(kernels).pvalue > 1e-3
    assert np.array_equal(~np.isnan(X[:, 5]), X[:, 4] == 1)
    for c in configs:
        space.validate(c)


def test_sampling_is_reproducible(space):
    assert space.sample(20, rng=3) == space.sample(20, rng=3)
    assert space.sample(20, rng=3) != space.sample(20, rng=4)


# -- validation messages ------------------------------------------------------


def one(name, **spec):
    return {"params": {name: spec}}


@pytest.mark.parametrize(
    "definition, parts",
    [
        (one("lr", type="real", low=1.0, high=0.1), ["'lr'", "low=1.0", "high=0.1", "low < high"]),
        (one("trees", type="integer", low=9, high=3), ["'trees'", "low=9", "high=3", "swap"]),
        (one("lr", type="real", low=0.0, high=1.0, log=True), ["'lr'", "log scale", "low=0.0", "positive bounds"]),
        (one("lr", type="real", low=-1.0, high=1.0, log=True), ["'lr'", "low=-1.0", "low > 0"]),
        (one("n", type="integer", low=0, high=9, log=True), ["'n'", "low=0", "low >= 1"]),
        (one("lr", type="float", low=0, high=1), ["'lr'", "type 'float'", "real, integer, choice"]),
        (one("lr", type="real", low=0, high=1, step=0.1), ["'lr'", "'step'", "allowed keys"]),
        (one("lr", type="real", low="small", high=1), ["'lr'", "'low'", "'small'", "finite number"]),
        (one("n", type="integer", low=1.5, high=4), ["'n'", "1.5", "whole number"]),
        (one("k", type="choice", choices=["a", "b", "a"]), ["'k'", "repeats a level ('a')", "distinct"]),
        (one("k", type="choice", choices=[1, 1.0]), ["'k'", "repeats a level (1)", "distinct"]),
        (one("k", type="choice", choices=[]), ["'k'", "non-empty list"]),
        (one("k", type="choice", choices=["a", None]), ["'k'", "None", "strings, finite numbers or booleans"]),
        ({"params": {}}, ["non-empty 'params'"]),
        ({"params": {"C": {"type": "real", "low": 0, "high": 1}}, "owner": "x"}, ["'owner'", "allowed"]),
    ],
)
def test_parameter_errors_name_parameter_value_and_what_is_allowed(definition, parts):
    with pytest.raises(SpaceError) as info:
        Space.from_dict(definition, where="svm.toml")
    message = str(info.value)
    assert message.startswith("svm.toml: ")
    for part in parts:
        assert part in message, (part, message)


CHOICE = {"type": "choice", "choices": ["rbf", "poly"]}


@pytest.mark.parametrize(
    "params, parts",
    [
        ({"degree": {"type": "integer", "low": 1, "high": 3, "when": {"kern": ["poly"]}}, "kernel": CHOICE},
         ["'degree'", "'kern'", "not a parameter", "'kernel'"]),
        ({"lr": {"type": "real", "low": 0, "high": 1}, "d": {"type": "integer", "low": 1, "high": 3, "when": {"lr": [1]}}},
         ["'d'", "'lr'", "choice parameters"]),
        ({"kernel": CHOICE, "d": {"type": "integer", "low": 1, "high": 3, "when": {"kernel": ["sigmoid"]}}},
         ["'d'", "'sigmoid'", "not a level of 'kernel'", '"rbf", "poly"']),
        ({"a": {"type": "choice", "choices": ["x", "y"], "when": {"b": ["u"]}},
          "b": {"type": "choice", "choices": ["u", "v"], "when": {"a": ["x"]}}},
         ["cycle", "a -> b -> a"]),
        ({"a": {"type": "choice", "choices": ["x", "y"], "when": {"a": ["x"]}}}, ["cycle", "a -> a"]),
        ({"kernel": CHOICE, "d": {"type": "integer", "low": 1, "high": 3, "when": "poly"}}, ["'d'", "when='poly'"]),
    ],
)
def test_condition_errors(params, parts):
    with pytest.raises(SpaceError) as info:
        Space.from_dict({"params": params})
    for part in parts:
        assert part in str(info.value), (part, str(info.value))


@pytest.mark.parametrize(
    "config, parts",
    [
        ({"C": 1.0, "tol": 0.1, "n_trees": 10, "depth": 2, "kernel": "rbf", "gamma": 1}, ["unknown", "'gamma'"]),
        ({"C": 1.0, "tol": 0.1, "n_trees": 10, "depth": 2, "kernel": "poly"}, ["lacks", "'degree'", "integer in [2, 5]"]),
        ({"C": 1.0, "tol": 0.1, "n_trees": 10, "depth": 2, "kernel": "rbf", "degree": 3}, ["'degree'", "inactive", "kernel in ['poly']"]),
        ({"C": 1e4, "tol": 0.1, "n_trees": 10, "depth": 2, "kernel": "rbf"}, ["'C'", "10000.0", "out of range", "[0.001, 1000.0]"]),
        ({"C": 1.0, "tol": 0.1, "n_trees": 10, "depth": 2.5, "kernel": "rbf"}, ["'depth'", "2.5", "whole number"]),
        ({"C": 1.0, "tol": "0.1", "n_trees": 10, "depth": 2, "kernel": "rbf"}, ["'tol'", "'0.1'", "not a number"]),
        ({"C": 1.0, "tol": True, "n_trees": 10, "depth": 2, "kernel": "rbf"}, ["'tol'", "True", "not a number"]),
        ({"C": float("nan"), "tol": 0.1, "n_trees": 10, "depth": 2, "kernel": "rbf"}, ["'C'", "nan", "not finite"]),
        ({"C": 1.0, "tol": 0.1, "n_trees": 10, "depth": 2, "kernel": "sigmoid"}, ["'kernel'", "'sigmoid'", '"rbf", "poly", "linear"']),
    ],
)
def test_config_errors(space, config, parts):
    with pytest.raises(SpaceError) as info:
        space.validate(config)
    for part in parts:
        assert part in str(info.value), (part, str(info.value))


def test_errors_are_warmstart_errors():
    assert issubclass(SpaceError, WarmstartError) and issubclass(SpaceError, ValueError)


def test_level_counts_and_kinds_are_kept_read_only():
    # the arrays are built once per space and shared by every density: nobody may change them
    space = Space.from_dict({"params": {"x": {"type": "real", "low": 0, "high": 1},
                                        "k": {"type": "choice", "choices": ["a", "b", "c"]},
                                        "n": {"type": "integer", "low": 1, "high": 4}}})
    assert space.n_levels.tolist() == [0, 3, 4]
    assert space.is_choice.tolist() == [False, True, False]
    with pytest.raises(ValueError):
        space.n_levels[1] = 7
    with pytest.raises(ValueError):
        space.is_choice[0] = True
    assert space.n_levels.tolist() == [0, 3, 4]


@settings(max_examples=60, deadline=None)
@given(st.lists(st.lists(st.one_of(st.floats(-0.5, 1.5), st.just(float("nan"))), min_size=3, max_size=3),
                min_size=1, max_size=12))
def test_snap_clips_rounds_and_keeps_inactive_coordinates(rows):
    # analytic: a real coordinate is clipped to [0, 1], a choice rounded to a level index and
    # clipped to 0..k-1, an integer moved to its cell's centre; NaN stays NaN (no conditions here)
    space = Space.from_dict({"params": {"x": {"type": "real", "low": 0, "high": 1},
                                        "k": {"type": "choice", "choices": ["a", "b", "c"]},
                                        "n": {"type": "integer", "low": 1, "high": 4}}})
    X = np.array(rows, dtype=float)
    S = space.snap(X)
    for (x, k, n), (sx, sk, sn) in zip(X, S):
        assert (math.isnan(x) and math.isnan(sx)) or sx == min(max(x, 0.0), 1.0)
        assert (math.isnan(k) and math.isnan(sk)) or sk == min(max(float(np.round(k)), 0.0), 2.0)
        if math.isnan(n):
            assert math.isnan(sn)
        else:  # cells of width 1/4: centres 1/8, 3/8, 5/8, 7/8
            cell = min(max(math.floor(min(max(n, 0.0), 1.0) * 4), 0), 3)
            assert sn == pytest.approx((cell + 0.5) / 4, abs=1e-12)
    assert not np.shares_memory(S, X) and np.array_equal(np.isnan(X), np.isnan(S))
