"""history.html (and the `gate history` command): the history as one static page with inline
SVG charts, beside history.json.

No JavaScript, no requests: the page carries the same Content-Security-Policy as summary.html.
Charts are drawn by matplotlib's SVG backend (imported here only, so `gate check` never loads
it), text kept as text, ids salted per chart so several inline SVGs never share an id.

Colours: the Okabe–Ito palette (Okabe & Ito, "Color Universal Design", 2008), which stays
distinguishable under the common colour-vision deficiencies; status is also told by marker
shape and by words in every table.
"""

from __future__ import annotations

import datetime as dt
import html
import io
import json
import math
import re
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

from gate.artefacts.files import write_atomic
from gate.artefacts.history import (
    Group,
    History,
    breached_features,
    build_history,
    changes,
    describe_identity,
    history_document,
    policy_changes,
    vif_series,
    waiver_rows,
)
from gate.errors import OutputError

CSP = "default-src 'none'; style-src 'unsafe-inline'; img-src data:"
#: Okabe–Ito colours.
OKABE_ITO = {"orange": "#E69F00", "sky_blue": "#56B4E9", "bluish_green": "#009E73",
             "yellow": "#F0E442", "blue": "#0072B2", "vermillion": "#D55E00",
             "reddish_purple": "#CC79A7", "black": "#000000"}
STATUS_COLOUR = {"pass": OKABE_ITO["bluish_green"], "warn": OKABE_ITO["orange"],
                 "fail": OKABE_ITO["vermillion"], "missing": OKABE_ITO["black"]}
STATUS_MARKER = {"pass": "o", "warn": "^", "fail": "X", "missing": "s"}
STATUS_WORD = {"pass": "\u2714 PASS", "warn": "\u25b2 WARN", "fail": "\u2716 FAIL"}
MAX_VIF_CHARTS = 24
MAX_RUN_ROWS = 10_000
MAX_CHANGE_ROWS = 500
MAX_POLICY_MARKS = 60
MAX_NAMES_IN_CELL = 12
DASH = "\u2014"
CHART_WIDTH_IN = 12.4  # at 100 dpi: fits a 1280 px window with the page margins

CAUTION = (
    "This history flags statistical risk in feature tables over time. It does not say whether "
    "a model is fair, lawful or fit for its purpose. Where models feed decisions about people "
    "(credit, insurance, hiring and the like), your team's model-risk policy and licensed or "
    "regulated practice decide."
)

_CSS = """
:root { color-scheme: light; }
body { margin: 0; background: #f4f2ec; color: #1d2330;
  font-family: system-ui, -apple-system, "Segoe UI", Roboto, "Liberation Sans", Arial, sans-serif;
  font-size: 15px; line-height: 1.45; }
header { padding: 20px 28px 14px; background: #1d2330; color: #f4f2ec; }
header h1 { margin: 0 0 4px; font-size: 22px; font-weight: 600; }
header p { margin: 0; color: #c9cdd6; font-size: 13px; overflow-wrap: anywhere; }
main { padding: 8px 28px 32px; max-width: 1400px; }
.alarm { margin: 16px 0; padding: 14px 18px; background: #000; color: #fff; font-size: 17px;
  font-weight: 700; border-left: 10px solid #D55E00; overflow-wrap: anywhere; }
.alarm span { display: block; font-weight: 400; font-size: 14px; margin-top: 4px; }
section { background: #fff; margin: 18px 0; padding: 12px 18px 16px; border-left: 5px solid
  #0072B2; border-radius: 3px; box-shadow: 0 1px 2px rgba(0,0,0,0.08); }
h2 { margin: 4px 0 8px; font-size: 18px; color: #1d2330; overflow-wrap: anywhere; }
h3 { margin: 14px 0 6px; font-size: 15px; color: #24406b; }
p.note { color: #4a5263; font-size: 13px; margin: 6px 0; }
p.caution { border: 1px dashed #8a7a52; background: #fbf8ee; padding: 10px 12px; font-size: 13px; }
table { border-collapse: collapse; font-size: 13px; margin: 6px 0; }
th, td { border-bottom: 1px solid #e1ded6; padding: 3px 8px; text-align: left;
  vertical-align: top; }
th { background: #ebe8e0; position: sticky; top: 0; }
td.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
td.when { white-space: nowrap; }
tr.broken td { background: #fde3d6; }
tr.policy td:first-child { border-left: 4px solid #0072B2; }
.scroll { max-height: 640px; overflow: auto; border: 1px solid #e1ded6; }
.chart svg { width: 100%; height: auto; max-width: 1240px; }
code { font-family: ui-monospace, "DejaVu Sans Mono", monospace; font-size: 12px; }
footer { padding: 0 28px 24px; color: #6a7080; font-size: 12px; }
"""


_CONTROL = re.compile("[\x00-\x1f\x7f]")


def _e(value: object) -> str:
    """Escaped text, control characters shown (never raw)."""
    text = str(value)
    if _CONTROL.search(text):
        text = text.encode("unicode_escape").decode("ascii")
    return html.escape(text)


def _num(value: float | None, digits: int = 3) -> str:
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "\u2014"
    if math.isinf(value):
        return "\u221e"
    return f"{value:,.{digits}g}" if abs(value) < 1e6 else f"{value:.3e}"


def history_html(history: History) -> str:
    parts: list[str] = []
    chain = history.chain
    if chain is not None and not chain.chain_ok:
        parts.append(
            '<div class="alarm" id="chain-broken" role="alert">AUDIT CHAIN BROKEN at line '
            f"{chain.bad_line}: {_e(chain.problem)}<span>The record is not proven complete. "
            "Runs from that line on are marked in the tables; `gate audit verify` gives the "
            "details.</span></div>")
    if history.record_problems:
        shown = history.record_problems[:10]
        items = "; ".join(f"line {p['line']}: {_e(p['problem'])} "
                          f"(<code>{_e(p['sha256'][:12])}</code>)" for p in shown)
        more = len(history.record_problems) - len(shown)
        parts.append(
            '<div class="alarm" id="record-incomplete" role="alert">RECORD INCOMPLETE: '
            f"{len(history.record_problems)} stored verdict"
            f"{'s' if len(history.record_problems) > 1 else ''} missing or altered"
            f"<span>{items}{f'; and {more} more' if more > 0 else ''}</span></div>")
    for note in history.notes:
        parts.append(f'<p class="note">{_e(note)}.</p>')
    if not history.groups:
        parts.append('<p class="note" id="empty">No runs to show.</p>')
    names = history.feature_names()
    keys = history.key_list()
    for number, group in enumerate(history.groups, start=1):
        parts.append(_group_section(history, group, number, names, keys))
    parts.append(f'<p class="caution">{_e(CAUTION)}</p>')
    runs = sum(len(g.runs) for g in history.groups)
    filters = ", ".join(f"{k} {v}" for k, v in history.filters.items() if v is not None)
    subtitle = (f"{_e(history.source)} ({history.kind}) \u00b7 {runs:,} run"
                f"{'s' if runs != 1 else ''} in {len(history.groups)} group"
                f"{'s' if len(history.groups) != 1 else ''}"
                f"{' · filtered by ' + _e(filters) if filters else ''} \u00b7 generated "
                f"{_e(history.generated_at)}")
    state = "BROKEN RECORD" if history.exit_code else "complete record"
    return (
        "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n"
        f'<meta http-equiv="Content-Security-Policy" content="{CSP}">\n'
        '<meta name="viewport" content="width=device-width, initial-scale=1">\n'
        f"<title>Check history \u2014 {state}</title>\n<style>{_CSS}</style>\n</head>\n<body>\n"
        f"<header><h1>Check history</h1><p>{subtitle}</p></header>\n<main>\n"
        + "\n".join(parts)
        + "\n</main>\n<footer>collinearity-gate history \u00b7 every figure is also in "
        "history.json.</footer>\n</body>\n</html>\n")


def _group_section(history: History, group: Group, number: int, names: list[str],
                   keys: list[Any]) -> str:
    runs = group.runs
    first, last = runs[0].created_at, runs[-1].created_at
    out = [(f'<section id="group-{number}"><h2>Table {_e(group.table)} \u00b7 policy '
           f"{_e(group.policy_name)}</h2>"),
           (f'<p class="note">{len(runs):,} run{"s" if len(runs) != 1 else ""} from '
           f"{_e(first)} to {_e(last)}.</p>")]
    out.append(_waiver_table(history, group, number))
    out.append("<h3>Status over time</h3>")
    out.append(f'<div class="chart" id="timeline-{number}">{_timeline_svg(group, number)}</div>')
    features = breached_features(group)
    out.append("<h3>VIF over time, for each feature that ever breached</h3>")
    if features:
        shown = features[:MAX_VIF_CHARTS]
        series = vif_series(group, shown)
        out.append('<p class="note">Blue line: the VIF in each run. Dashed vermillion line: '
                   "the policy's VIF limit. Purple triangles at the top: an infinite VIF (the "
                   "feature was part of an exact dependency).</p>")
        out.append(f'<div class="chart" id="vif-{number}">'
                   f"{_vif_svg(group, [names[f] for f in shown], series, number)}</div>")
        if len(features) > len(shown):
            rest = ", ".join(_e(names[f]) for f in features[len(shown):])
            out.append(f'<p class="note">Charts are drawn for the {len(shown)} features with '
                       f"the highest peak VIF; also breached (series in history.json): "
                       f"{rest}.</p>")
    else:
        out.append('<p class="note">No feature breached the VIF limit in these runs.</p>')
    out.append(_changes_table(group, number, keys))
    out.append(_runs_table(group, number))
    out.append("</section>")
    return "\n".join(out)


def _waiver_table(history: History, group: Group, number: int) -> str:
    rows: list[tuple[str, Any]] = waiver_rows(group, history.today, history.horizon)
    head = (f"<h3>Waivers (expiring within {history.horizon} days of "
            f"{history.today.isoformat()} first)</h3>")
    if not rows:
        return head + '<p class="note">No waiver appears in these runs.</p>'
    word = {"expiring": "\u25b2 expiring soon", "expired": "\u2716 expired",
            "active": "\u2714 active", "unknown": "? unreadable date"}
    body = "".join(
        f"<tr><td>{word[kind]}</td><td class=\"when\">{_e(w.expires)}</td><td>{_e(w.rule)}"
        f"</td><td>{_e(', '.join(w.features))}</td><td>{_e(w.owner)}</td><td>{_e(w.reason)}"
        f"</td><td class=\"when\">{_e(w.first_seen)}</td><td class=\"when\">{_e(w.last_seen)}"
        f"</td><td class=\"num\">{w.runs:,}</td></tr>"
        for kind, w in rows)
    return (head + f'<table id="waivers-{number}"><thead><tr><th>state</th><th>expires</th>'
            "<th>rule</th><th>features</th><th>granted by (owner)</th><th>reason</th>"
            "<th>first seen</th><th>last seen</th><th>runs</th></tr></thead>"
            f"<tbody>{body}</tbody></table>")


def _names(items: Sequence[str]) -> str:
    shown = [_e(i) for i in items[:MAX_NAMES_IN_CELL]]
    more = len(items) - len(shown)
    return "<br>".join(shown) + (f"<br>\u2026 and {more} more" if more > 0 else "")


def _changes_table(group: Group, number: int, keys: list[Any]) -> str:
    rows: list[str] = []
    total = 0
    for pos, appeared, resolved in changes(group):
        total += 1
        if len(rows) >= MAX_CHANGE_ROWS:
            continue
        run = group.runs[pos]
        rows.append(f"<tr><td class=\"when\">{_e(run.created_at)}</td><td>{_e(run.label or '')}"
                    f"</td><td>{_names([describe_identity(keys[k]) for k in appeared])}</td>"
                    f"<td>{_names([describe_identity(keys[k]) for k in resolved])}</td></tr>")
    head = "<h3>Findings that appeared or were resolved (fail and warn)</h3>"
    if not rows:
        return head + '<p class="note">No finding appeared or was resolved between runs.</p>'
    note = (f'<p class="note">The first {MAX_CHANGE_ROWS} of {total:,} changes; all are in '
            "history.json.</p>" if total > len(rows) else "")
    return (head + note + f'<div class="scroll"><table id="changes-{number}"><thead><tr>'
            "<th>run (UTC)</th><th>label</th><th>appeared</th><th>resolved</th></tr></thead>"
            f"<tbody>{''.join(rows)}</tbody></table></div>")


def _runs_table(group: Group, number: int) -> str:
    changed = policy_changes(group)
    rows = []
    runs = group.runs
    shown = runs[-MAX_RUN_ROWS:]
    offset = len(runs) - len(shown)
    for pos, run in enumerate(shown, start=offset):
        classes = []
        if run.after_break:
            classes.append("broken")
        if changed[pos]:
            classes.append("policy")
        status = STATUS_WORD.get(run.status, _e(run.status))
        if run.problem:
            status += f"<br><b>{_e(run.problem)}</b>"
        if run.after_break:
            status += "<br><b>after the chain break</b>"
        policy = f"<code>{_e((run.policy_sha256 or DASH)[:12])}</code>"
        if changed[pos]:
            policy += " <b>\u25c6 policy changed</b>"
        vif = _num(run.max_vif)
        if run.max_vif_feature:
            vif += f" ({_e(run.max_vif_feature)})"
        cls = f' class="{" ".join(classes)}"' if classes else ""
        known = run.problem is None or not run.problem.startswith(("stored", "first"))
        counts = (f"<td class=\"num\">{run.counts.get('fail', 0)}</td>"
                  f"<td class=\"num\">{run.counts.get('warn', 0)}</td>"
                  f"<td class=\"num\">{run.counts.get('info', 0)}</td>"
                  f"<td class=\"num\">{run.waived}</td>") if known else \
            '<td class="num" colspan="4">unknown</td>'
        condition = "rank deficient" if run.rank_deficient and known else \
            _num(run.condition_number)
        rows.append(f"<tr{cls}><td class=\"when\">{_e(run.created_at)}</td>"
                    f"<td>{_e(run.label or '')}</td><td>{status}</td>{counts}"
                    f"<td class=\"num\">{vif}</td><td class=\"num\">{condition}</td>"
                    f"<td>{policy}</td></tr>")
    note = (f'<p class="note">The latest {len(shown):,} of {len(runs):,} runs; all are in '
            "history.json.</p>" if offset else "")
    return ("<h3>Runs</h3>" + note + f'<div class="scroll"><table id="runs-{number}"><thead><tr>'
            "<th>run (UTC)</th><th>label</th><th>status</th><th>fail</th><th>warn</th>"
            "<th>info</th><th>waived</th><th>max VIF (feature)</th><th>condition number</th>"
            "<th>policy sha256</th></tr></thead>"
            f"<tbody>{''.join(reversed(rows))}</tbody></table></div>")


# ----------------------------------------------------------------------------- charts


def _pyplot() -> Any:
    import matplotlib

    matplotlib.use("svg", force=True)
    import matplotlib.pyplot as plt

    return plt


_RC: Any = {"svg.fonttype": "none", "text.parse_math": False, "font.size": 10,
       "axes.titlesize": 10, "axes.labelsize": 10, "path.simplify": True,
       "path.simplify_threshold": 0.5, "axes.spines.top": False, "axes.spines.right": False}


def _svg(figure: Any, salt: str) -> str:
    import matplotlib

    buffer = io.StringIO()
    with matplotlib.rc_context({"svg.hashsalt": salt}):
        figure.savefig(buffer, format="svg", metadata={"Date": None, "Creator": None})
    text = buffer.getvalue()
    start = text.find("<svg")
    return text[start:] if start >= 0 else ""


def _times(group: Group) -> tuple[np.ndarray, np.ndarray]:
    """Matplotlib date numbers of the runs with a readable time, and their positions."""
    import matplotlib.dates as mdates

    known = [(pos, run.moment) for pos, run in enumerate(group.runs) if run.moment is not None]
    if not known:
        return np.zeros(0), np.zeros(0, np.int64)
    positions = np.array([k for k, _ in known], np.int64)
    moments = [m.replace(tzinfo=None) for _, m in known]
    return np.asarray(mdates.date2num(moments), dtype=float), positions  # type: ignore[no-untyped-call]


def _date_axis(axis: Any, most: int = 8) -> None:
    import matplotlib.dates as mdates

    locator = mdates.AutoDateLocator(minticks=2, maxticks=most)  # type: ignore[no-untyped-call]
    axis.xaxis.set_major_locator(locator)
    axis.xaxis.set_major_formatter(mdates.DateFormatter("%Y-%m-%d"))  # type: ignore[no-untyped-call]


def _plain_log_axis(axis: Any) -> None:
    """Log scale with ticks written as plain numbers (1, 10, 100, 1e+04)."""
    from matplotlib.ticker import FuncFormatter, LogLocator, NullLocator

    axis.set_yscale("log")
    axis.yaxis.set_major_locator(LogLocator(base=10, numticks=6))
    axis.yaxis.set_major_formatter(FuncFormatter(lambda v, _pos: f"{v:g}"))
    axis.yaxis.set_minor_locator(NullLocator())  # unlabelled minor ticks: cost, no reading


def _pixel_columns(x: np.ndarray, values: np.ndarray, columns: int
                   ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Min/max decimation to the chart's pixel columns, so a chart costs the same for 100 runs
    as for 100,000 and no peak or trough disappears.

    ``x`` (n runs, any order) and ``values`` (n x k) -> (x, low/high interleaved: 2 points per
    occupied column, the column's smallest then largest finite value (NaN when it has none),
    per column: any infinite value, per column: its x). The line drawn through the points
    covers, in every pixel column, exactly the range of values of the runs that fall in it.
    Fewer runs than ``columns`` are returned as they are (one point each).
    """
    values = values.reshape(x.size, -1)
    if x.size <= columns:
        return x, values, np.isinf(values), x
    low_x, high_x = float(x.min()), float(x.max())
    span = (high_x - low_x) or 1.0
    bins = np.minimum(((x - low_x) / span * columns).astype(np.int64), columns - 1)
    order = np.argsort(bins, kind="stable")
    ordered = bins[order]
    starts = np.flatnonzero(np.r_[True, ordered[1:] != ordered[:-1]])
    v = values[order]
    finite = np.isfinite(v)
    low = np.minimum.reduceat(np.where(finite, v, np.inf), starts, axis=0)
    high = np.maximum.reduceat(np.where(finite, v, -np.inf), starts, axis=0)
    low[np.isinf(low)] = np.nan
    high[np.isinf(high)] = np.nan
    infinite = np.logical_or.reduceat(np.isinf(v), starts, axis=0)
    at = x[order][starts]
    points = np.empty((2 * starts.size, v.shape[1]))
    points[0::2], points[1::2] = low, high
    return np.repeat(at, 2), points, infinite, at


def _plot_columns(axis: Any) -> int:
    """The axis's width in pixels (the figure is drawn at 100 dpi)."""
    figure = axis.get_figure()
    width_in = float(figure.get_figwidth()) * float(axis.get_position().width)
    return max(50, int(width_in * float(figure.dpi)))


def _timeline_svg(group: Group, number: int) -> str:
    import matplotlib

    plt = _pyplot()
    x, positions = _times(group)
    levels = {"pass": 0, "warn": 1, "fail": 2}
    with matplotlib.rc_context(_RC):
        figure, axis = plt.subplots(figsize=(CHART_WIDTH_IN, 2.4), dpi=100)
        try:
            statuses = [("missing" if group.runs[p].problem and
                         group.runs[p].problem.startswith("stored") else group.runs[p].status)
                        for p in positions.tolist()]
            y = np.array([levels.get(s, 1.5) for s in statuses], dtype=float)
            figure.subplots_adjust(left=0.08, right=0.83, top=0.95, bottom=0.22)
            columns = _plot_columns(axis)
            if x.size:
                line_x, line_y, _, _ = _pixel_columns(x, y, columns)
                axis.step(line_x, line_y[:, 0], where="post", color="#8a8f99", linewidth=0.8,
                          zorder=1)
            for status, colour in STATUS_COLOUR.items():
                mask = np.array([s == status for s in statuses], dtype=bool)
                if mask.any():
                    label = {"missing": "verdict missing"}.get(status, status)
                    # One marker per pixel column that holds a run of this status; the
                    # legend counts every run.
                    _, _, _, at = _pixel_columns(x[mask], y[mask], columns)
                    axis.scatter(at, np.full(at.size, levels.get(status, 1.5)),
                                 s=36 if at.size < 500 else 12,
                                 marker=STATUS_MARKER[status], color=colour, zorder=2,
                                 label=f"{label} ({int(mask.sum()):,})", linewidths=0)
            changed = policy_changes(group)
            marks = [x[k] for k, p in enumerate(positions.tolist()) if changed[p]]
            for k, at in enumerate(marks[:MAX_POLICY_MARKS]):
                axis.axvline(at, color=OKABE_ITO["blue"], linestyle=":", linewidth=1,
                             label="policy changed" if k == 0 else None, zorder=0)
            broken = [x[k] for k, p in enumerate(positions.tolist()) if group.runs[p].after_break]
            if broken:
                axis.axvspan(broken[0], x[-1] if x[-1] > broken[0] else broken[0] + 1e-3,
                             color=OKABE_ITO["vermillion"], alpha=0.15, zorder=0,
                             label="after the chain break")
            axis.set_yticks([0, 1, 2], ["pass", "warn", "fail"])
            axis.set_ylim(-0.5, 2.5)
            axis.set_ylabel("status of the run")
            axis.set_xlabel("run time (UTC)")
            _date_axis(axis)
            axis.legend(loc="upper left", bbox_to_anchor=(1.0, 1.0), frameon=False,
                        fontsize=9)
            axis.grid(axis="y", color="#e1ded6", linewidth=0.6)
            return _svg(figure, f"timeline-{number}")
        finally:
            plt.close(figure)


def _vif_svg(group: Group, names: list[str], series: np.ndarray, number: int) -> str:
    import matplotlib

    plt = _pyplot()
    x, positions = _times(group)
    values = series[positions] if positions.size else series[:0]
    limits = [r.vif_limit for r in group.runs if r.vif_limit is not None]
    limit = limits[-1] if limits else None
    columns = 3 if len(names) > 2 else len(names)
    rows = math.ceil(len(names) / columns)
    with matplotlib.rc_context(_RC):
        figure, axes = plt.subplots(rows, columns, figsize=(CHART_WIDTH_IN, 2.3 * rows),
                                    dpi=100, squeeze=False, sharex=True)
        try:
            figure.subplots_adjust(left=0.07, right=0.99, top=1 - 0.35 / (2.3 * rows),
                                   bottom=0.6 / (2.3 * rows), hspace=0.45, wspace=0.22)
            finite_all = values[np.isfinite(values)]
            top = float(finite_all.max()) if finite_all.size else 10.0
            ceiling = max(top, limit or 1.0) * 2.0
            line_x, points, infinite_at, at = _pixel_columns(x, values,
                                                             _plot_columns(axes[0][0]))
            for c, name in enumerate(names):
                axis = axes[c // columns][c % columns]
                column = points[:, c] if points.size else np.zeros(0)
                finite = np.where(np.isfinite(column), column, np.nan)
                axis.plot(line_x, finite, color=OKABE_ITO["blue"], linewidth=1.1,
                          marker="o" if line_x.size <= 60 else None, markersize=3)
                infinite = infinite_at[:, c] if infinite_at.size else np.zeros(0, bool)
                if infinite.any():
                    axis.scatter(at[infinite], np.full(int(infinite.sum()), ceiling / 1.5),
                                 marker="^", s=30, color=OKABE_ITO["reddish_purple"],
                                 linewidths=0)
                if limit is not None:
                    axis.axhline(limit, color=OKABE_ITO["vermillion"], linestyle="--",
                                 linewidth=1.2)
                _plain_log_axis(axis)
                axis.set_ylim(0.8, ceiling)
                # A fixed title position: matplotlib's automatic one measures every tick
                # label of every small chart (most of the drawing time at 24 charts).
                axis.set_title(name if len(name) <= 60 else name[:59] + "\u2026", loc="left",
                               y=1.0, pad=4)
                if c % columns == 0:
                    axis.set_ylabel("VIF (ratio, log scale)")
                if c // columns == rows - 1 or c + columns >= len(names):
                    axis.set_xlabel("run time (UTC)")
                    axis.xaxis.set_tick_params(labelbottom=True)
                _date_axis(axis, 4)
                axis.grid(axis="y", color="#e1ded6", linewidth=0.6)
            for c in range(len(names), rows * columns):
                axes[c // columns][c % columns].set_visible(False)
            return _svg(figure, f"vif-{number}")
        finally:
            plt.close(figure)


def write_history(history: History, out_dir: str | Path) -> list[Path]:
    """Write history.json and history.html into ``out_dir`` (each atomically)."""
    folder = Path(out_dir)
    try:
        # No indent: json's indenting encoder is pure Python, seconds at 10,000 runs.
        text = json.dumps(history_document(history), allow_nan=False,
                          ensure_ascii=False) + "\n"
        written = [write_atomic(folder / "history.json", text)]
        written.append(write_atomic(folder / "history.html", history_html(history)))
    except OSError as exc:
        if isinstance(exc, OutputError):
            raise
        raise OutputError(f"{folder}: cannot write the history ({exc.strerror or exc}); "
                          "choose a writable --out folder") from None
    return written


def run_history(source: str | Path, out_dir: str | Path, *, horizon: int = 30,
                since: str | None = None, until: str | None = None,
                label: str | None = None, today: dt.date | None = None,
                quiet: bool = False) -> int:
    """`gate history`: build, write, print one summary line; return the exit code."""
    import sys

    history = build_history(source, horizon=horizon, since=since, until=until, label=label,
                            today=today)
    written = write_history(history, out_dir)
    runs = sum(len(g.runs) for g in history.groups)
    if not quiet:
        print(f"{runs} run{'s' if runs != 1 else ''} in {len(history.groups)} group"
              f"{'s' if len(history.groups) != 1 else ''}; wrote "
              f"{', '.join(str(p) for p in written)}")
        if history.chain is not None and not history.chain.chain_ok:
            print(f"gate: audit chain broken: {history.chain.describe()}", file=sys.stderr)
        if history.record_problems:
            first = history.record_problems[0]
            more = len(history.record_problems) - 1
            print(f"gate: record incomplete: line {first['line']}: {first['problem']}"
                  f"{f' (and {more} more)' if more else ''}", file=sys.stderr)
    return history.exit_code
