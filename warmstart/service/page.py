"""The read-only web page for the team: studies with filters, a study's
best-so-far curve and best configs, a task's neighbors, the latest gain report.

Server-rendered HTML (every value escaped) with curves as inline SVG, so the
page needs no script and nothing from the internet. The numbers come from the
same functions as the API's (``study_curve``, ``task_neighbors_body``).
"""

from __future__ import annotations

import math
from html import escape
from typing import Annotated, Callable, Sequence
from urllib.parse import urlencode

import pandas as pd
from fastapi import APIRouter, Depends, Query, Request
from fastapi import Path as PathParam
from fastapi.responses import HTMLResponse

from warmstart.service.api import filter_studies, parse_tags, study_curve, study_or_404, task_neighbors_body
from warmstart.service.core import Service
from warmstart.service.errors import ServiceError

__all__ = ["page_router", "line_chart"]

_STYLE = """
body{font-family:system-ui,sans-serif;margin:1.5rem;color:#222;max-width:72rem}
h1{font-size:1.4rem}h2{font-size:1.1rem;margin-top:1.6rem}
table{border-collapse:collapse;font-size:.9rem}td,th{padding:.25rem .6rem;border-bottom:1px solid #ddd;text-align:left}
td.n{text-align:right;font-variant-numeric:tabular-nums}nav a{margin-right:1rem}
form input{margin-right:.6rem;width:9rem}.note{color:#666;font-size:.85rem}
"""
_COLOURS = ("#1f77b4", "#d62728", "#2ca02c", "#9467bd", "#ff7f0e", "#8c564b")


def _page(title: str, body: str) -> HTMLResponse:
    html = (f"<!doctype html><html lang='en'><head><meta charset='utf-8'><title>{escape(title)}</title>"
            f"<meta name='viewport' content='width=device-width'><style>{_STYLE}</style></head><body>"
            "<nav><a href='/'>studies</a><a href='/gain'>latest gain report</a>"
            "<a href='/api/v1/openapi.json'>API description</a></nav>"
            f"<h1>{escape(title)}</h1>{body}</body></html>")
    return HTMLResponse(html)


def _fmt(value) -> str:
    if value is None:
        return "-"
    if isinstance(value, float):
        return "-" if not math.isfinite(value) else f"{value:.4g}"
    if isinstance(value, dict):
        return ", ".join(f"{k}={_fmt(v)}" for k, v in value.items())
    if isinstance(value, pd.Timestamp):
        return value.strftime("%Y-%m-%d %H:%M")
    try:
        if pd.isna(value):
            return "-"
    except (TypeError, ValueError):
        pass
    return str(value)


def _table(rows: Sequence[dict], columns: Sequence[str], links: dict[str, Callable[[dict], str]] | None = None,
           table_id: str = "") -> str:
    links = links or {}
    head = "".join(f"<th>{escape(c)}</th>" for c in columns)
    body = []
    for row in rows:
        cells = []
        for c in columns:
            value = row.get(c)
            text = escape(_fmt(value))
            if c in links:
                text = f"<a href='{escape(links[c](row))}'>{text}</a>"
            numeric = isinstance(value, (int, float)) and not isinstance(value, bool)
            cells.append(f"<td class='n'>{text}</td>" if numeric else f"<td>{text}</td>")
        body.append("<tr>" + "".join(cells) + "</tr>")
    ident = f" id='{escape(table_id)}'" if table_id else ""
    return f"<table{ident}><thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table>"


def line_chart(series: dict[str, Sequence[tuple[float, float]]], x_label: str, y_label: str,
               width: int = 640, height: int = 300, points: dict[str, Sequence[tuple[float, float]]] | None = None,
               chart_id: str = "curve") -> str:
    """An inline SVG chart: a line per series (and optional dots), with axes,
    five ticks on each and a legend. Empty or single-valued data still draws."""
    points = points or {}
    every = [p for s in list(series.values()) + list(points.values()) for p in s
             if p[1] is not None and math.isfinite(p[1])]
    left, right, top, bottom = 64, 16, 16, 44
    w, h = width - left - right, height - top - bottom
    if every:
        x0, x1 = min(p[0] for p in every), max(p[0] for p in every)
        y0, y1 = min(p[1] for p in every), max(p[1] for p in every)
    else:
        x0, x1, y0, y1 = 0.0, 1.0, 0.0, 1.0
    if x1 == x0:
        x0, x1 = x0 - 1, x1 + 1
    if y1 == y0:
        y0, y1 = y0 - 0.5, y1 + 0.5
    pad = (y1 - y0) * 0.05
    y0, y1 = y0 - pad, y1 + pad

    def sx(x: float) -> float:
        return left + (x - x0) / (x1 - x0) * w

    def sy(y: float) -> float:
        return top + (1 - (y - y0) / (y1 - y0)) * h

    parts = [f"<svg id='{escape(chart_id)}' xmlns='http://www.w3.org/2000/svg' width='{width}' height='{height}' "
             f"role='img' aria-label='{escape(y_label)} by {escape(x_label)}'>",
             f"<rect x='{left}' y='{top}' width='{w}' height='{h}' fill='none' stroke='#999'/>"]
    for i in range(5):
        xv = x0 + (x1 - x0) * i / 4
        yv = y0 + (y1 - y0) * i / 4
        parts.append(f"<text x='{sx(xv):.1f}' y='{top + h + 16}' font-size='11' text-anchor='middle'>{xv:.4g}</text>")
        parts.append(f"<text x='{left - 6}' y='{sy(yv) + 4:.1f}' font-size='11' text-anchor='end'>{yv:.4g}</text>")
    parts.append(f"<text x='{left + w / 2}' y='{height - 6}' font-size='12' text-anchor='middle'>"
                 f"{escape(x_label)}</text>")
    parts.append(f"<text x='14' y='{top + h / 2}' font-size='12' text-anchor='middle' "
                 f"transform='rotate(-90 14 {top + h / 2})'>{escape(y_label)}</text>")
    for i, (label, pts) in enumerate(points.items()):
        colour = "#aaa" if i == 0 else _COLOURS[(i + 2) % len(_COLOURS)]
        for x, y in pts:
            if y is not None and math.isfinite(y):
                parts.append(f"<circle cx='{sx(x):.1f}' cy='{sy(y):.1f}' r='2.5' fill='{colour}'/>")
    for i, (label, pts) in enumerate(series.items()):
        good = [(x, y) for x, y in pts if y is not None and math.isfinite(y)]
        if not good:
            continue
        colour = _COLOURS[i % len(_COLOURS)]
        path = " ".join(f"{sx(x):.1f},{sy(y):.1f}" for x, y in good)
        parts.append(f"<polyline class='series' data-label='{escape(label)}' points='{path}' fill='none' "
                     f"stroke='{colour}' stroke-width='2'/>")
        parts.append(f"<text x='{left + 8}' y='{top + 14 + 14 * i}' font-size='12' fill='{colour}'>"
                     f"{escape(label)}</text>")
    parts.append("</svg>")
    return "".join(parts)


def _study_html(view, study_id: int) -> HTMLResponse:
    """A study's page: its facts, best-so-far curve and best configs (404 for an unknown study)."""
    row = study_or_404(view, study_id)
    table = view.trial_table(study_id)
    curve = study_curve(table, row["maximize"])
    chart = line_chart(
        {"best so far": [(c["number"], c["best"]) for c in curve]},
        "trial", f"{row['metric']} ({row['direction']})",
        points={"trial scores": [(c["number"], c["score"]) for c in curve]},
    )
    space = row["space"]
    ok = table[table["status"] == "ok"].sort_values("score", ascending=not row["maximize"]).head(10)
    best = _table(ok.to_dict(orient="records"), ["number"] + space.names + ["score", "cost_s"],
                  table_id="best")
    facts = [
        ("task", f"<a href='/tasks/{int(row['task_id'])}?{escape(urlencode({'learner': row['learner']}))}'>"
                 f"{escape(str(row['task']))}</a> (its neighbors)"),
        ("learner", escape(row["learner"])), ("origin", escape(row["origin"])),
        ("metric", escape(f"{row['metric']} ({row['direction']})")),
        ("trials", escape(f"{row['trial_count']} ({int(row['trial_count'] - row['n_ok'])} failed)")),
        ("best", escape(_fmt(row["best_score"]))), ("owner", escape(_fmt(row["owner"]))),
        ("tags", escape(_fmt(row["tags"]) or "-")),
        ("space", escape("; ".join(f"{p.name}: {p.describe()}" for p in space))),
    ]
    info = "<table>" + "".join(f"<tr><th>{k}</th><td>{v}</td></tr>" for k, v in facts) + "</table>"
    body = (info + "<h2>Best so far</h2>" + chart + "<h2>Best configs</h2>"
            + (best if len(ok) else "<p>no successful trial yet</p>"))
    return _page(f"study {study_id}: {row['learner']} on {row['task']}", body)


def _gain_html(view) -> HTMLResponse:
    """The latest gain report: pooled bits, the hit-rate curves and the per-task table."""
    from warmstart.service.jobs import latest_report

    report = latest_report(view)
    if report is None:
        return _page("latest gain report", "<p id='gain'>no gain report yet: POST /api/v1/gain starts a "
                                           "replay (or <code>warmstart gain --server URL</code>)</p>")
    r = report["result"]
    p = r["pooled"]
    head = (f"<p id='gain'>{escape(r['learner'])}, budget {r['budget']}, {r['repeats']} runs each, replay "
            f"{escape(r['replay'])}; {report['created_at']} by {escape(_fmt(report['owner']))}</p>"
            f"<p>pooled over {p['n_tasks']} tasks: warm {p['bits_warm']:+.2f} bits, cold {p['bits_cold']:+.2f} "
            f"bits over uniform; gain {p['gain']:+.2f} bits (95% {p['gain_low']:+.2f} to {p['gain_high']:+.2f}); "
            f"transfer hurt on {p['share_hurt']:.0%} of tasks</p>")
    curves = {label: [(i + 1, v) for i, v in enumerate(c["hit_rate"])] for label, c in r["curves"].items()}
    chart = line_chart(curves, "query", "chance the query lands in the target set", chart_id="gain-curve")
    rows = sorted(r["tasks"], key=lambda t: -(t.get("gain") or 0))
    table = _table(rows, ["task", "bits_warm", "bits_cold", "gain", "gain_low", "gain_high", "verdict"])
    return _page("latest gain report", head + chart + "<h2>Per task</h2>" + table)


def page_router(service: Service, page_who: Callable) -> APIRouter:
    """Routes of the page; ``page_who(request)`` checks a token (Bearer or Basic)."""
    router = APIRouter(include_in_schema=False)

    def who(request: Request):
        return page_who(request)

    @router.get("/", response_class=HTMLResponse)
    def studies_page(
        _=Depends(who),
        learner: Annotated[str | None, Query(max_length=200)] = None,
        task: Annotated[str | None, Query(max_length=200)] = None,
        owner: Annotated[str | None, Query(max_length=200)] = None,
        tag: Annotated[str | None, Query(max_length=400)] = None,
    ) -> HTMLResponse:
        filters = {k: v or None for k, v in dict(learner=learner, task=task, owner=owner).items()}
        tags = parse_tags([tag]) if tag else {}
        everything = service.reader().studies()
        frame = filter_studies(everything, tags=tags, **filters)
        form = "".join(
            f"<label>{name} <input name='{name}' value='{escape(value or '')}'></label>"
            for name, value in (("learner", learner), ("task", task), ("owner", owner), ("tag", tag))
        )
        form = f"<form method='get' action='/'>{form}<button type='submit'>filter</button></form>"
        rows = frame.sort_values("study_id", ascending=False).to_dict(orient="records")
        columns = ["study_id", "task", "learner", "metric", "origin", "trial_count", "best_score", "owner", "tags",
                   "created_at"]
        table = _table(rows, columns, links={
            "study_id": lambda r: f"/studies/{int(r['study_id'])}",
            "task": lambda r: f"/tasks/{int(r['task_id'])}",
        }, table_id="studies") if rows else "<p id='studies'>no study matches</p>"
        note = (f"<p class='note'>{len(rows)} of {len(everything)} studies; the task links show a task's "
                "neighbors</p>")
        return _page("warmstart: studies", form + note + table)

    @router.get("/studies/{study_id}", response_class=HTMLResponse)
    def study_page(study_id: Annotated[int, PathParam(ge=1, le=2**62)], _=Depends(who)) -> HTMLResponse:
        return _study_html(service.reader(), study_id)

    @router.get("/tasks/{task_id}", response_class=HTMLResponse)
    def task_page(task_id: Annotated[int, PathParam(ge=1, le=2**62)], _=Depends(who),
                  learner: Annotated[str | None, Query(max_length=200)] = None) -> HTMLResponse:
        try:
            found = task_neighbors_body(service, task_id, learner or None, 10)
        except ServiceError as exc:
            if exc.status != 422:
                raise
            return _page(f"task {task_id}", f"<p>{escape(exc.message)}</p>")
        columns = ["task", "distance", "similarity", "n_studies", "study_ids", "trial_count", "best_score", "metric"]
        body = (f"<p class='note'>nearest first{' among tasks with ' + escape(learner) + ' studies' if learner else ''}"
                "; the same similarity that weights a prior</p>"
                + _table(found["neighbors"], columns, links={"task": lambda r: f"/tasks/{int(r['task_id'])}"},
                         table_id="neighbors")
                + "".join(f"<p class='note'>{escape(n)}</p>" for n in found["notes"]))
        return _page(f"neighbors of {found['task']}", body)

    @router.get("/gain", response_class=HTMLResponse)
    def gain_page(_=Depends(who)) -> HTMLResponse:
        return _gain_html(service.reader())

    return router
