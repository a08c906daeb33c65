"""Commands that transfer history to a new task and measure it: ``prior``, ``gain``."""

from __future__ import annotations

import click

from warmstart.cli.common import (
    fail, get_archive, json_option, keep_column_option, print_json, print_table, profile_table, read_data,
    strict_option,
)
from warmstart.cli.limits import (
    MAX_QUERIES, MAX_QUERIES_PER_TASK, MAX_REPEATS, MAX_WORKERS, OutputFile,
)
from warmstart.cli.main import main
from warmstart.cli.progress import Progress
from warmstart.gain.bits import interval_text, queries_text
from warmstart.text import bits_in_words


def _budgets(text: str) -> list[int]:
    try:
        values = [int(v) for v in text.split(",") if v.strip()]
    except ValueError:
        raise click.BadParameter(f"{text!r} is not a comma-separated list of whole numbers, e.g. 10,20",
                                 param_hint="'--budget'") from None
    if not values or any(v < 1 or v > MAX_QUERIES for v in values):
        raise click.BadParameter(f"{text!r}: each budget must be a whole number from 1 to {MAX_QUERIES:,}, "
                                 "e.g. 10,20", param_hint="'--budget'")
    return values


def _check_work(budgets: list[int], repeats: int) -> None:
    """Refuse budgets x repeats that no replay finishes in a working day (MAX_QUERIES_PER_TASK)."""
    queries = sum(budgets) * repeats
    if queries > MAX_QUERIES_PER_TASK:
        raise click.UsageError(
            f"--budget {','.join(map(str, budgets))} with --repeats {repeats} asks each search for {queries:,} "
            f"queries per held-out task; at most {MAX_QUERIES_PER_TASK:,} (100 times the usual --budget 10 "
            "--repeats 30, which takes minutes on 2 cores): lower --repeats or --budget")


def resolve_space(space_path, learner: str, kind: str):
    """The space file if given, else the learner's built-in default space."""
    from warmstart.space import Space

    if space_path:
        return Space.load(space_path)
    from warmstart.evaluate.learners import default_space

    return default_space(learner, kind)


@main.command()
@click.argument("data", type=click.Path(dir_okay=False))
@click.option("--target", required=True, help="Target column of DATA.")
@click.option("--learner", required=True, help="Learner whose past studies feed the prior.")
@click.option("--space", "space_path", type=click.Path(dir_okay=False), help="Space of the new search (default: the learner's built-in space).")
@click.option("-o", "--output", type=OutputFile(),
              help="Write the prior as JSON here (into an existing directory).")
@keep_column_option
@strict_option
@json_option
@click.pass_context
def prior(ctx, data, target, learner, space_path, output, keep_columns, as_json):
    """Build a prior for a new dataset DATA from similar past studies."""
    from warmstart.archive.store import fingerprint
    from warmstart.profile import detect_kind

    from warmstart.cli.remote import server_client

    frame = read_data(data, target, keep_columns=keep_columns)
    client = server_client(ctx)
    kind = detect_kind(frame[target])
    space = resolve_space(space_path, learner, kind)
    prof = profile_table(frame, target, data, kind, keep_columns)
    if client is not None:  # built by the service from its archive; the data stays here
        found = client.prior(prof, learner, space=space.to_dict(), kind=kind,
                             exclude_fingerprint=fingerprint(frame, target))
        if output:
            fail("-o writes a prior built here; with --server use --json to keep the service's provenance")
        print_json(found["provenance"]) if as_json else click.echo(found["summary"])
        return
    archive = get_archive(ctx, write=False)
    tasks = archive.tasks()
    same = tasks.loc[tasks["fingerprint"] == fingerprint(frame, target), "task_id"].tolist()
    built = archive.build_prior(prof, learner=learner, space=space, exclude_tasks=same)
    if output:
        built.save(output)
    if as_json:
        print_json(built.provenance)
        return
    if same:
        names = tasks.set_index("task_id")["name"]
        which = ", ".join(f"{t} ({names[t]!r})" for t in same)
        click.echo(f"This dataset is already in the archive as task {which}, so that task's own studies were "
                   "left out of the prior.")
    click.echo(built.summary(n=8))
    if output:
        click.echo(f"prior written to {output}")


@main.command()
@click.option("--learner", "learners", multiple=True, help="Learner(s) to measure (default: every learner with studies on 2+ tasks).")
@click.option("--budget", "budget_text", default="10", show_default=True,
              help=f"Queries per search, comma-separated for several; each at most {MAX_QUERIES:,}, and under the "
                   "nearest replay at most a held-out task's number of recorded configs (a run evaluates each "
                   "once).")
@click.option("--repeats", default=30, show_default=True, type=click.IntRange(2, MAX_REPEATS),
              help=f"Runs per search and task; at most {MAX_REPEATS:,} (intervals narrow with the square root of "
                   f"the runs), and budgets x repeats at most {MAX_QUERIES_PER_TASK:,}.")
@click.option("--gamma", default=0.05, show_default=True, type=click.FloatRange(0.001, 0.5), help="Target set: top share of scores.")
@click.option("--seed", default=0, show_default=True, type=int)
@click.option("--workers", default=1, show_default=True, type=click.IntRange(1, MAX_WORKERS),
              help=f"Processes (tasks run in parallel); at most {MAX_WORKERS}.")
@click.option("--cluster", metavar="ADDRESS",
              help="Replay the held-out tasks on the workers of the Dask scheduler at ADDRESS (needs "
                   "warmstart[cluster]); the same figures as here for the same --seed.")
@click.option("--task", "only_tasks", multiple=True, help="Only these held-out tasks (names).")
@click.option("--replay", "objective", type=click.Choice(["nearest", "surrogate"]), default="nearest",
              show_default=True,
              help="How the held-out task scores a proposal: the nearest recorded config the run has not evaluated "
                   "yet, or a Gaussian-process surrogate fitted to its recorded trials.")
@click.option("--data", "data", type=click.Path(dir_okay=False),
              help="Live instead of replay: run warm and cold searches on this dataset (needs --target, one --learner).")
@click.option("--target", help="With --data: the target column.")
@click.option("--metric", help="With --data: a built-in metric (default accuracy or r2).")
@click.option("--cv", default=5, show_default=True, type=click.IntRange(min=2), help="With --data: cross-validation folds.")
@click.option("--report", "report_path", type=OutputFile(),
              help="Write an HTML report with plots here (into an existing directory).")
@click.option("--permuted", is_flag=True,
              help="Control: shuffle each held-out task's recorded scores among its configs first, so no past "
                   "task tells anything about it; transfer should gain nothing (and, under the nearest replay, "
                   "no search should gain over uniform).")
@keep_column_option
@strict_option
@json_option
@click.pass_context
def gain(ctx, learners, budget_text, repeats, gamma, seed, workers, cluster, only_tasks, objective, data, target,
         metric, cv, report_path, permuted, keep_columns, as_json):
    """Measure, in bits, whether warm starts beat cold ones on your history.

    Leave-one-task-out replay: each archived study is held out in turn and its
    recorded trials act as the objective; the prior comes from every other task.
    With --replay nearest (the default) a proposal scores what the nearest
    recorded config scored, so the target set is a few recorded configs; with
    --replay surrogate a Gaussian process fitted to the recorded trials scores
    it, and the target set is a region of the space, as in a live search.

    With --data FILE --target COL --learner L the comparison is live instead:
    a 64-config Sobol sample of the space defines the target set, then warm and
    cold searches train and cross-validate L on FILE, --repeats times each
    (every model is trained for real: start with --repeats 5).

    The warm search mixes past tasks and re-weights them at every result. A
    task counts as hurt only when its loss is significant (Wilcoxon test over
    its runs, Holm's correction across tasks); beside it, win/tie/loss with a
    region of practical equivalence of 0.1 bit. The library's own default
    config followed by a cold search is shown as a baseline for built-in learners.
    """
    from warmstart.gain.replay import leave_one_task_out

    budgets = _budgets(budget_text)
    _check_work(budgets, repeats)
    if cluster and (data or target):
        fail("--cluster spreads a replay's held-out tasks; a live comparison (--data) runs here: use --workers N")
    archive = get_archive(ctx, write=False)
    if data or target:
        from click.core import ParameterSource

        if ctx.get_parameter_source("objective") is not ParameterSource.DEFAULT:
            fail("--replay picks how a replay scores proposals; with --data the searches train on the data itself")
        if permuted:
            fail("--permuted is a control of the replay (it shuffles archived scores); it has no meaning with --data")
        results = _live(archive, data, target, learners, only_tasks, metric, cv, budgets, repeats, gamma, seed,
                        workers, as_json, keep_columns)
        _show(results, gamma, report_path, as_json)
        return
    if keep_columns:
        fail("--keep-column names a column of --data FILE; a replay uses the archived studies, not a data file")
    if metric:
        fail("--metric is for a live comparison (--data FILE --target COL); a replay scores with each study's own metric")
    studies = archive.studies()
    if not learners:
        counts = studies.groupby("learner")["task_id"].nunique()
        learners = tuple(sorted(counts[counts >= 2].index))
        if not learners:
            fail("gain needs studies of one learner on at least 2 tasks; `warmstart studies` shows what is there")
    known = set(studies["learner"])
    for learner in learners:
        if learner not in known:
            fail(f"no studies of learner {learner!r}; learners with studies: {sorted(known)}")
    executor = None
    if cluster:
        from warmstart.evaluate.cluster import ClusterPool

        executor = ClusterPool(cluster)
        ctx.call_on_close(lambda: executor.shutdown(wait=False, cancel_futures=True))
    results = []
    for learner in learners:
        for budget in budgets:
            bar = Progress(f"{learner} budget {budget}", enabled=not as_json)
            results.append(leave_one_task_out(
                archive, learner, budget=budget, repeats=repeats, gamma=gamma, seed=seed, workers=workers,
                progress=bar, tasks=list(only_tasks) or None, objective=objective, executor=executor,
                permuted=permuted,
            ))
    _show(results, gamma, report_path, as_json)


def _live(archive, data, target, learners, only_tasks, metric, cv, budgets, repeats, gamma, seed, workers, as_json,
          keep_columns=()):
    """Warm and cold searches side by side on DATA (``gain --data``)."""
    from pathlib import Path

    from warmstart.gain.live import live_gain, live_setup
    from warmstart.profile import detect_kind

    if not data or not target:
        fail("a live comparison needs both --data FILE and --target COL")
    if len(learners) != 1:
        fail(f"a live comparison needs exactly one --learner (got {len(learners)}); "
             "it trains that learner on --data")
    if only_tasks:
        fail("--task picks held-out tasks of a replay; it has no meaning with --data")
    learner = learners[0]
    frame = read_data(data, target, keep_columns=keep_columns)
    kind = detect_kind(frame[target])
    prof = profile_table(frame, target, data, kind, keep_columns)
    setup = live_setup(archive, frame, target, learner, metric=metric, cv=cv, seed=seed,
                       keep_columns=keep_columns, profile=prof)
    objective, prior, default = setup.objective, setup.prior, setup.default
    if not as_json:
        click.echo(f"live: {learner} on {Path(data).name} ({kind}), {cv}-fold {objective.metric}; "
                   + prior.summary(n=3).splitlines()[0]
                   + ("; the archive's own studies of this dataset were left out" if setup.excluded else ""))
    if not as_json and default.notes():
        click.echo(f"library default of {learner!r}: {default.notes()}")
    results = []
    for budget in budgets:
        results.append(live_gain(
            objective.space, objective, prior, budget=budget, repeats=repeats, gamma=gamma,
            maximize=objective.maximize, seed=seed, workers=workers, task=Path(data).name, learner=learner,
            progress=Progress(f"{learner} live, budget {budget}", enabled=not as_json), default=default.config,
        ))
    return results


def _show(results, gamma, report_path, as_json) -> None:
    """Print (table or JSON) and optionally report gain results of a replay or a live run."""
    from warmstart.gain.replay import HINDSIGHT

    if report_path:
        from warmstart.gain.report import write_report

        write_report(results, report_path, notes=_noise_notes(results))
    if as_json:
        print_json([{"learner": r.learner, "budget": r.budget, "repeats": r.repeats, "target_share": r.gamma,
                     "replay": getattr(r, "objective", "live"), "permuted": bool(getattr(r, "permuted", False)),
                     "pooled": r.pooled.to_dict(),
                     "tasks": r.to_frame().to_dict(orient="records")} for r in results])
        return
    click.echo(bits_in_words(gamma))  # once, before the first figures
    for r in results:
        frame = r.to_frame()
        cols = ["task", "bits_warm", "bits_cold", "gain", "gain_low", "gain_high", "verdict"]
        live = not hasattr(r, "objective")
        if live:
            how = f"top {gamma:.0%} of a {len(r.reference_scores)}-config Sobol sample; live"
        else:
            how = f"top {gamma:.0%}; replay: {_REPLAY_WORDS[r.objective]}"
        click.echo(f"\n{r.learner}, budget {r.budget}, {r.repeats} runs each (target: {how}):")
        print_table(frame.sort_values("gain", ascending=False)[cols])
        if live:
            t = r.tasks[0]
            click.echo(f"warm {t.bits_warm:+.2f} bits, cold {t.bits_cold:+.2f} bits over uniform; gain {t.gain:+.2f} bits "
                       f"({interval_text(t.gain_low, t.gain_high)}; {t.verdict})"
                       + (" [a search never hit: smoothed]" if t.smoothed else "")
                       + f"; median queries to the first hit: warm {queries_text(t.first_hit_warm)}, "
                       f"cold {queries_text(t.first_hit_cold)}")
            if "bits_library_default" in t.extra:
                click.echo(f"the library's default first, then a cold search: {t.extra['bits_library_default']:+.2f} "
                           "bits over uniform")
            continue
        p = r.pooled
        hurt = f"transfer hurt on {p.share_hurt:.0%} of tasks"
        if p.share_hurt_outside_noise == p.share_hurt_outside_noise:  # not NaN
            hurt += f" ({p.share_hurt_outside_noise:.0%} of those whose target stands out of CV noise)"
        if getattr(r, "permuted", False):
            click.echo("CONTROL: every held-out task's scores were shuffled among its configs; transfer should "
                       "gain nothing here")
        click.echo(
            f"pooled over {p.n_tasks} tasks: warm {p.bits_warm:+.2f} bits, cold {p.bits_cold:+.2f} bits over uniform; "
            f"gain {p.gain:+.2f} bits (95% {p.gain_low:+.2f} to {p.gain_high:+.2f}); Wilcoxon p = {p.wilcoxon_p:.3g}; "
            + hurt
        )
        click.echo(_verdict_line(p))
        above = {k[17:]: v for k, v in p.extra.items() if k.startswith("share_warm_above_")}
        if above:
            click.echo("warm's hit rate above each baseline's on: "
                       + "  ".join(f"{k} {v:.0%}" for k, v in above.items()) + " of tasks")
        if getattr(r, "permuted", False):
            click.echo(_control_line(r))
        base = {k[5:]: v for k, v in p.extra.items() if k.startswith("bits_") and k[5:] not in HINDSIGHT}
        seen = {k[5:]: v for k, v in p.extra.items() if k.startswith("bits_") and k[5:] in HINDSIGHT}
        if base:
            click.echo("baselines, bits over uniform: " + "  ".join(f"{k} {v:+.2f}" for k, v in base.items()))
        if seen:
            click.echo("in hindsight (peeking at the held-out scores, not searches): "
                       + "  ".join(f"{k} {v:+.2f}" for k, v in seen.items()))
    if report_path:
        click.echo(f"\nreport written to {report_path}")


_REPLAY_WORDS = {"nearest": "nearest recorded config not yet evaluated by the run",
                 "surrogate": "Gaussian-process surrogate"}


def _verdict_line(p) -> str:
    """Win/tie/loss, the loss share with its Wilson interval, and the Holm-significant losses."""
    return (f"win/tie/loss {p.wins}/{p.ties}/{p.losses} (equivalence region +-0.1 bit); losses {p.share_loss:.0%} "
            f"(95% {p.share_loss_low:.0%} to {p.share_loss_high:.0%}); significant losses (paired test over runs, "
            f"Holm): {p.significant_losses} of {p.n_tasks}")


def _control_line(r) -> str:
    """Share of permuted tasks on which each search reached 1 and 2 bits over uniform, beside 2^-b."""
    from warmstart.gain.bits import HINDSIGHT_LABELS
    from warmstart.gain.control import markov_bound, share_at_least

    frame = r.to_frame()
    labels = ["warm", "cold"] + [c[5:] for c in frame.columns
                                 if c.startswith("bits_") and c[5:] not in ("warm", "cold", *HINDSIGHT_LABELS)]
    parts = []
    for b in (1.0, 2.0):
        shares = "  ".join(f"{k} {share_at_least(frame[f'bits_{k}'], b):.0%}" for k in labels)
        parts.append(f">= {b:g} bit: {shares} (a fixed list: at most {markov_bound(b):.0%} in expectation)")
    return "control, share of tasks reaching " + "; ".join(parts)



def _noise_notes(results) -> list[str]:
    notes = []
    for r in results:
        noisy = [t.task for t in r.tasks if t.extra.get("within_noise")]
        if noisy:
            notes.append(
                f"{r.learner}: on {len(noisy)} of {len(r.tasks)} tasks the target set's scores lie within about one "
                f"point of the best (within typical cross-validation noise), so hits there say little: "
                + ", ".join(noisy[:12]) + (" ..." if len(noisy) > 12 else "")
            )
    return notes
