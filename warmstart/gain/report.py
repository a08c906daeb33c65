"""Plots (matplotlib, PNG) and a self-contained HTML report of gain results."""

from __future__ import annotations

import base64
import html
import io
import math
from datetime import datetime, timezone
from pathlib import Path
from typing import Sequence

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

from warmstart.errors import WarmstartError  # noqa: E402
from warmstart.text import bits_in_words  # noqa: E402


def _gamma(results) -> float:
    """The target share of the results (the default 5 % when they differ or there are none)."""
    shares = {float(r.gamma) for r in results if getattr(r, "gamma", None) is not None}
    return shares.pop() if len(shares) == 1 else 0.05

__all__ = ["plot_gain_per_task", "plot_curves", "write_report"]

_COLORS = {"warm": "#d9480f", "cold": "#1c7ed6", "random": "#868e96", "defaults": "#2b8a3e", "nearest": "#7048e8",
           "library_default": "#e67700"}


def _png(fig) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=110, bbox_inches="tight")
    plt.close(fig)
    return buf.getvalue()


def plot_gain_per_task(result, path: str | Path | None = None) -> bytes:
    """Gain of warm over cold per task with 95 % intervals (bits). Returns PNG bytes."""
    rows = sorted(result.tasks, key=lambda t: t.gain)
    fig, ax = plt.subplots(figsize=(7, max(2.5, 0.22 * len(rows) + 1)))
    y = np.arange(len(rows))
    gains = np.array([t.gain for t in rows])
    lo = gains - np.array([t.gain_low for t in rows])
    hi = np.array([t.gain_high for t in rows]) - gains
    colors = ["#2b8a3e" if t.verdict == "helped" else "#c92a2a" if t.verdict == "hurt" else "#868e96" for t in rows]
    ax.errorbar(gains, y, xerr=[lo, hi], fmt="none", ecolor="#adb5bd", elinewidth=1.5, capsize=2)
    ax.scatter(gains, y, c=colors, zorder=3, s=18)
    ax.axvline(0, color="black", lw=0.8)
    ax.axvline(result.pooled.gain, color=_COLORS["warm"], lw=1, ls="--", label=f"pooled {result.pooled.gain:+.2f} bits")
    ax.set_yticks(y)
    ax.set_yticklabels([t.task[:28] + ("*" if t.smoothed else "") for t in rows], fontsize=7)
    ax.set_xlabel("gain of warm over cold (bits, 95 % interval over runs)")
    ax.set_title(f"{result.learner}: gain per held-out task, budget {result.budget}")
    ax.legend(loc="lower right", fontsize=8)
    data = _png(fig)
    if path:
        Path(path).write_bytes(data)
    return data


def plot_curves(result, path: str | Path | None = None) -> bytes:
    """Hit rate per query and best-so-far regret, averaged over tasks. Returns PNG bytes."""
    fig, (a1, a2) = plt.subplots(1, 2, figsize=(10, 3.6))
    p = float(np.mean([t.p for t in result.tasks]))
    for label, (hits, regret) in result.curves.items():
        t = np.arange(1, len(hits) + 1)
        style = "-" if label in ("warm", "cold", "random") else ":"
        a1.plot(t, hits, style, color=_COLORS.get(label), label=label, marker="o", ms=3)
        a2.plot(t, regret, style, color=_COLORS.get(label), label=label, marker="o", ms=3)
    a1.axhline(p, color="black", lw=0.8, ls="--", label="uniform p")
    a1.set_xlabel("query")
    a1.set_ylabel("chance the query hits the target set")
    a1.set_title("hit rate per query")
    a2.set_xlabel("query")
    a2.set_ylabel("best-so-far regret (share of score range)")
    a2.set_title("best-so-far regret")
    a1.legend(fontsize=8)
    a2.legend(fontsize=8)
    data = _png(fig)
    if path:
        Path(path).write_bytes(data)
    return data


def _img(data: bytes, alt: str) -> str:
    return f'<img alt="{html.escape(alt)}" src="data:image/png;base64,{base64.b64encode(data).decode()}">'


def _fmt(v) -> str:
    """A cell: numbers to 3 significant digits; missing (None, NaN) as a dash, never 'None'."""
    if isinstance(v, (bool, np.bool_)):
        return "yes" if v else ""
    if isinstance(v, np.generic):
        v = v.item()
    if v is None:
        return "–"
    if isinstance(v, float):
        if math.isnan(v):
            return "–"
        if math.isinf(v):
            return "never"
        return f"{v:.3g}"
    return html.escape(str(v))


def _head(name: str) -> str:
    """A column name that may wrap at its underscores (a narrow column for a long name)."""
    return "_<wbr>".join(html.escape(part) for part in name.split("_"))


def _table(rows: Sequence[dict], columns: Sequence[str]) -> str:
    head = "".join(f"<th>{_head(c)}</th>" for c in columns)
    body = "".join("<tr>" + "".join(f"<td>{_fmt(r.get(c))}</td>" for c in columns) + "</tr>" for r in rows)
    return f"<div class='wide'><table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table></div>"


def _pooled_table(summary: Sequence[dict], measures: Sequence[str]) -> str:
    """The pooled figures with one column per result and one row per measure, so that
    twenty-odd measures fit the page (a measure a result lacks shows a dash)."""
    head = "<th>measure</th>" + "".join(
        f"<th>{html.escape(str(d['learner']))}<br>budget {d['budget']}<br>{html.escape(str(d['replay']))}</th>"
        for d in summary)
    body = "".join(f"<tr><td>{html.escape(m)}</td>" + "".join(f"<td>{_fmt(d.get(m))}</td>" for d in summary)
                   + "</tr>" for m in measures)
    return f"<div class='wide'><table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table></div>"


def write_report(results, path: str | Path, title: str = "warmstart: transfer gain", notes: Sequence[str] = ()) -> Path:
    """Write a self-contained HTML report (plots embedded) of replay or live results.

    Parameters
    ----------
    results : sequence of ReplayResult
    path : str or Path
    title : str
    notes : sequence of str
        Paragraphs added under the title (e.g. cautions about noise).
    """
    path = Path(path)
    parts = [
        "<!doctype html><html><head><meta charset='utf-8'>",
        f"<title>{html.escape(title)}</title>",
        "<style>body{font-family:system-ui,sans-serif;max-width:1100px;margin:2em auto;padding:0 1em;color:#212529}"
        "table{border-collapse:collapse;font-size:12px;margin:1em 0}td,th{border:1px solid #dee2e6;padding:2px 6px;"
        "text-align:right}th{background:#f1f3f5;vertical-align:bottom}td{white-space:nowrap}"
        "td:first-child,th:first-child{text-align:left}img{max-width:100%}.wide{max-width:100%;overflow-x:auto}"
        ".note{color:#495057;font-size:14px}</style></head><body>",
        f"<h1>{html.escape(title)}</h1>",
        f"<p><b>{html.escape(bits_in_words(_gamma(results)))}.</b></p>",
        f"<p class='note'>Written {datetime.now(timezone.utc):%Y-%m-%d %H:%M} UTC. Bits over uniform = log2(q/p): q is a "
        "search's per-query chance of landing in the target set (the top share of the task's scores under uniform "
        "sampling), p the same chance for a uniform draw. Gain = log2(q_warm/q_cold). Intervals are 95 % bootstraps "
        "over runs (per task) or over tasks (pooled). * marks a task where a search never hit and its rate was "
        "smoothed. Columns bits_best_past_task and bits_ideal_list are hindsight figures, not searches: the best list a "
        "single past task offered, picked after seeing the held-out scores, and a list of every target config first "
        "(the most any run of the nearest replay can reach; 1 under the surrogate replay, whose target set is a "
        "region). Replay 'nearest': each query of a run scores what the held-out task's nearest recorded config not yet "
        "evaluated by that run scored (a run evaluates each recorded config once; p is the target share of the recorded "
        "configs). Replay "
        "'surrogate': a Gaussian process fitted to the held-out task's recorded trials scores it. "
        "share_hurt_outside_noise counts only tasks whose "
        "target set stands out of cross-validation noise. A task's verdict is 'hurt' (or 'helped') only when the "
        "Wilcoxon test over its runs stays significant after Holm's correction across tasks (alpha 0.05); "
        "win/tie/loss compare its gain with a region of practical equivalence of +-0.1 bit, and the share of "
        "losses carries a Wilson 95 % interval. bits_library_default is scikit-learn's default config first, "
        "then a cold search; share_warm_above_X is the share of tasks on which warm hit more often than X.</p>",
    ]
    parts.extend(f"<p class='note'>{html.escape(n)}</p>" for n in notes)
    summary = []
    for r in results:
        d = r.pooled.to_dict()
        d["learner"] = r.learner
        d["budget"] = r.budget
        d["repeats"] = r.repeats
        d["replay"] = getattr(r, "objective", "live")
        summary.append(d)
    cols = ["learner", "budget", "replay", "repeats", "n_tasks", "bits_warm", "bits_cold", "gain", "gain_low", "gain_high",
            "wilcoxon_p", "share_hurt", "share_hurt_outside_noise", "wins", "ties", "losses", "share_loss",
            "share_loss_low", "share_loss_high", "significant_losses"]
    cols += sorted({k for d in summary for k in d if k.startswith(("bits_", "share_warm_above_")) and k not in cols})
    measures = [c for c in cols if c not in ("learner", "budget", "replay") and any(c in d for d in summary)]
    parts.append("<h2>Pooled over tasks</h2>" + _pooled_table(summary, measures))
    for r in results:
        replay = getattr(r, "objective", None)
        how = f", replay {html.escape(replay)}" if replay else ""
        parts.append(f"<h2>{html.escape(r.learner)} — budget {r.budget}{how}, {r.repeats} runs per search</h2>")
        parts.append(_img(plot_gain_per_task(r), "gain per task"))
        parts.append(_img(plot_curves(r), "hit rate and regret curves"))
        rows = [{**t.to_dict(), "task": t.task + ("*" if t.smoothed else "")}
                for t in sorted(r.tasks, key=lambda t: -t.gain)]
        tcols = ["task", "p", "bits_warm", "bits_cold", "gain", "gain_low", "gain_high", "verdict", "p_holm",
                 "outcome", "first_hit_warm", "first_hit_cold"]
        parts.append(_table(rows, tcols))
        # the baselines in a table of their own, so that each table fits the page
        others = sorted({k for row in rows for k in row if k.startswith("bits_") and k not in tcols})
        if others:
            parts.append("<p class='note'>Baselines and hindsight figures on each task, bits over uniform:</p>"
                         + _table(rows, ["task", "bits_warm", *others]))
    parts.append("</body></html>")
    if not path.parent.is_dir():  # never a chain of new folders
        raise WarmstartError(f"{path}: the directory {path.parent} does not exist; create it first, or give a "
                             "report path in an existing directory")
    path.write_text("\n".join(parts), encoding="utf-8")
    return path
