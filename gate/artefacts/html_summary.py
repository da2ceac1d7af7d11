"""summary.html: one self-contained page for people, built from great-tables fragments.

The page is our own small HTML document (title, a Content-Security-Policy that forbids every
request, page CSS) holding one ``<section>`` per table. Each table is a great-tables fragment
with a fixed id, so the same verdict gives the same bytes. Nothing is recomputed: every number
comes from the Verdict (its Diagnostics arrays, Design and Policy).

Safety: every user string (column names, levels, labels, waiver text, file names) reaches the
page either as a plain great-tables cell, label or note (great-tables escapes those) or through
``html.escape`` in this module. No ``fmt(...)`` callable, ``html()`` or ``md()`` is used, because
great-tables trusts their output as markup. The CSP meta tag is a second line of defence.

Size and speed: great-tables writes every body cell into its frame one at a time, so the
tables show what a reader acts on and cap the rest (breaches first; verdict.json keeps every
number). The frames are pandas by default and polars in the `gate` command
(``gate.artefacts.frames``), the cheapest input great-tables supports: measured on one
machine, a 10-feature page renders in 0.07 s from polars against 0.12 s from pandas (pandas 3
keeps strings in pyarrow and rebuilds a chunk per cell write), and polars imports in 0.20 s
against pandas' 0.30 s, which a small table's whole check notices (1.23 -> 1.00 s). Polars
is not the default because its thread pool does not survive ``fork``: a process forked after
rendering a page (``multiprocessing`` on Linux, a test harness) would hang in its next render.
The command never forks. Both inputs give the same bytes (tests/test_html_summary.py).
pyarrow input is experimental in great-tables 1.1: its cell writes call ``pyarrow.array``,
which imports pandas anyway, and fail on formatted float columns.
"""

from __future__ import annotations

import html
import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from gate.artefacts.files import write_atomic
from gate.artefacts.frames import frame_library
from gate.diagnose.diagnostics import PROPORTION_ROWS
from gate.judge.findings import LEVELS, Finding, counts_text
from gate.judge.rules import (
    INTERCEPT_NAME,
    describe_dependency,
    effective_rows_label,
    index_breaches,
    removed_text,
)
from gate.numerics.kernels import INTERCEPT
from gate.policy.models import packaged_policy_path

if TYPE_CHECKING:
    from great_tables import GT

    from gate.judge.verdict import Verdict

#: Rows shown per table before the rest is summarised in a note (verdict.json has them all).
MAX_FEATURE_ROWS = 250
#: Features under the VIF limit shown after the breaches (largest VIF first).
MAX_QUIET_FEATURE_ROWS = 50
MAX_PAIR_ROWS = 200
MAX_FINDING_ROWS = 300
MAX_DEPENDENCY_ROWS = 200
MAX_MISSING_ROWS = 200
#: "Explained mostly by" lists auxiliary-regression terms with |standardised coefficient| at or
#: above this, for breaching features only (a term under 0.05 moves the feature by less than a
#: twentieth of a standard deviation per standard deviation: common practice, no source).
EXPLAINED_MIN = 0.05
#: The colour-scaled correlation matrix is drawn in full up to this many features (wider
#: designs: the features named by findings, up to as many), so it fits 1280 px.
MAX_MATRIX_FEATURES = 20
#: Condition-index table: design columns (rows) shown, and condition indices (columns) shown:
#: every breaching index up to the maximum, plus one below the limit for contrast, at least
#: the minimum.
MAX_CONDITION_ROWS = 20
MIN_CONDITION_INDICES = 3
#: The check computes the proportions of this many of the largest indices besides those over
#: the limit, so the table never asks for more.
MAX_CONDITION_INDICES = PROPORTION_ROWS

CSP = "default-src 'none'; style-src 'unsafe-inline'; img-src data:"

# Our palette: ink on warm paper; status colours always paired with a word and a symbol.
_STATUS_STYLE: dict[str, tuple[str, str, str, str]] = {
    # status: (symbol, word, text colour, background)
    "pass": ("\u2714", "PASS", "#14532d", "#dcf0e2"),
    "warn": ("\u25b2", "WARN", "#6b4200", "#fbecc8"),
    "fail": ("\u2716", "FAIL", "#8c1627", "#f9dde1"),
}
_LEVEL_MARK = {"fail": "\u2716 fail", "warn": "\u25b2 warn", "info": "\u2139 info"}
_WAIVED_MARK = "\u25cb waived"
_OK_MARK = "\u2714 ok"
_FILL = {"fail": "#f9dde1", "warn": "#fbecc8", "waived": "#e6e9f0", "pass": "#dcf0e2"}
_TEXT = {"fail": "#8c1627", "warn": "#6b4200", "waived": "#3b4660", "pass": "#14532d"}
_MATRIX_PALETTE = ["#2d5d8f", "#9dbbd6", "#f7f6f2", "#e0a98f", "#a8432b"]
_MATRIX_MISSING = "#e7e5df"
_PROPORTION_MARK = " \u25c6"

CAUTION = (
    "This summary flags statistical risk in a feature table: features that carry little "
    "information of their own, so that a linear model fitted on them has unstable "
    "coefficients and inflated standard errors. It does not say whether a model is fair, "
    "lawful or fit for its purpose. Where models feed decisions about people (credit, "
    "insurance, hiring and the like), your team's model-risk policy and licensed or "
    "regulated practice decide; use this page as one input to that review."
)


@dataclass(frozen=True)
class _Section:
    anchor: str
    title: str
    body: str  # already-safe HTML


def write_summary_html(verdict: Verdict, path: str | Path) -> Path:
    """Write summary.html for ``verdict`` atomically; return its path."""
    return write_atomic(path, summary_html(verdict))


def summary_html(verdict: Verdict) -> str:
    """The whole page as a string (deterministic for a given verdict).

    Findings and what to do come first (within the first screen at 1280 x 900), the evidence
    tables next, provenance (hashes, versions, limits) last before the caution.
    """
    if frame_library() == "polars":
        return _page(verdict, _sections(verdict))
    import pandas as pd

    # pandas 3 backs the "string" frames great-tables builds with pyarrow, rebuilding a chunk
    # per cell write; Python-object storage, for this call only, writes in place (-15%).
    with pd.option_context("mode.string_storage", "python"):
        return _page(verdict, _sections(verdict))


def _sections(verdict: Verdict) -> list[_Section]:
    return [
        _Section("findings", "Findings and next step", _findings_section(verdict)),
        _Section("features", "Per feature", _features_section(verdict)),
        _Section("pairs", "Correlated pairs", _pairs_section(verdict)),
        _Section("condition", "Condition indices", _condition_section(verdict)),
        _Section("dependencies", "Exact dependencies", _dependencies_section(verdict)),
        _Section("matrix", "Correlation matrix", _matrix_section(verdict)),
        _Section("missing", "Missing values", _missing_section(verdict)),
        *([_Section("segments", "Segments", _segments_section(verdict))]
          if verdict.segments or verdict.policy.segments is not None else []),
        _Section("provenance", "Provenance and limits", _provenance_section(verdict)),
        _Section("caution", "How to read this", f"<p class=\"caution\">{html.escape(CAUTION)}"
                 "</p>"),
    ]


# --- page ----------------------------------------------------------------------------------

_PAGE_CSS = """
:root { color-scheme: light; }
body { margin: 0; background: #f4f2ec; color: #1d2330;
  font-family: system-ui, -apple-system, "Segoe UI", Roboto, "Liberation Sans", Arial, sans-serif;
  font-size: 15px; line-height: 1.45; }
.page-head { padding: 20px 28px 14px; background: #1d2330; color: #f4f2ec; }
.page-head h1 { margin: 0 0 4px; font-size: 22px; font-weight: 600; }
.page-head .glance { margin: 8px 0 0; color: #e4e1d8; font-size: 14px; }
.page-head .sub { margin: 0; color: #c9cdd6; font-size: 13px; overflow-wrap: anywhere; }
.status-pill { display: inline-block; margin-top: 10px; padding: 6px 14px; border-radius: 4px;
  font-weight: 700; font-size: 18px; letter-spacing: 0.04em; border: 2px solid currentColor; }
.status-pill .why { font-weight: 400; font-size: 14px; letter-spacing: 0; margin-left: 10px; }
nav.toc { padding: 8px 28px; background: #e4e1d8; font-size: 13px; }
nav.toc a { color: #24406b; margin-right: 14px; text-decoration: none; }
nav.toc a:hover { text-decoration: underline; }
main { padding: 8px 28px 32px; max-width: 1400px; }
section.block { background: #ffffff; margin: 18px 0; padding: 12px 18px 16px;
  border-left: 5px solid #5b6b8c; border-radius: 3px; box-shadow: 0 1px 2px rgba(0,0,0,0.08); }
section.block > h2 { margin: 4px 0 8px; font-size: 17px; color: #24406b; }
section.block > p, section.block li { max-width: 95ch; }
div.next { background: #f3f6fb; border: 1px solid #c9d3e4; border-radius: 3px;
  padding: 4px 14px 6px; margin: 4px 0 12px; }
div.next h3 { margin: 6px 0 2px; font-size: 15px; }
div.next ol { margin: 4px 0; padding-left: 22px; }
div.next li { overflow-wrap: anywhere; }
section.block h3 { font-size: 15px; margin: 14px 0 6px; color: #24406b; }
p.note { color: #4a5263; font-size: 13px; margin: 6px 0; }
p.caution { border: 1px dashed #8a7a52; background: #fbf8ee; padding: 10px 12px; }
ul.design-notes { margin: 6px 0; padding-left: 20px; font-size: 13px; }
code { font-family: ui-monospace, "DejaVu Sans Mono", "Liberation Mono", monospace;
  font-size: 12px; overflow-wrap: anywhere; }
#findings td:first-child, #findings td.gt_right, #features td.gt_right, #pairs td,
#condition td, #waivers td:first-child { white-space: nowrap; }
#sec-matrix #matrix .gt_stub { max-width: 18em; white-space: normal; overflow-wrap: anywhere; }
footer { padding: 0 28px 24px; color: #6a7080; font-size: 12px; }
"""


def _page(verdict: Verdict, sections: Sequence[_Section]) -> str:
    symbol, word, colour, background = _STATUS_STYLE[verdict.status]
    source = html.escape(verdict.table.source)
    label = f" \u00b7 label {html.escape(verdict.label)}" if verdict.label else ""
    toc = "".join(f'<a href="#sec-{s.anchor}">{html.escape(s.title)}</a>' for s in sections)
    body = "\n".join(
        f'<section class="block" id="sec-{s.anchor}" aria-labelledby="sec-{s.anchor}-h">'
        f'<h2 id="sec-{s.anchor}-h">{html.escape(s.title)}</h2>\n{s.body}\n</section>'
        for s in sections
    )
    return (
        "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n"
        f'<meta http-equiv="Content-Security-Policy" content="{CSP}">\n'
        '<meta name="viewport" content="width=device-width, initial-scale=1">\n'
        f"<title>{word} \u00b7 collinearity gate \u00b7 {source}</title>\n"
        f"<style>{_PAGE_CSS}</style>\n</head>\n<body>\n"
        '<header class="page-head">\n'
        "<h1>Collinearity gate summary</h1>\n"
        f'<p class="sub">{source} \u00b7 policy {html.escape(verdict.policy.name)}{label} '
        f"\u00b7 {html.escape(verdict.created_at)}</p>\n"
        f'<div class="status-pill" id="status" role="status" '
        f'style="color:{colour};background:{background}">'
        f'<span aria-hidden="true">{symbol}</span> {word}'
        f'<span class="why"> \u2014 {html.escape(_status_reason(verdict))}</span></div>\n'
        f'<p class="glance">{html.escape(_glance(verdict))}</p>\n'
        f'</header>\n<nav class="toc" aria-label="Sections">{toc}</nav>\n'
        f"<main>\n{body}\n</main>\n"
        f"<footer>collinearity-gate {html.escape(verdict.tool_version)} \u00b7 generated from "
        "the same verdict as verdict.json, which holds every number.</footer>\n"
        "</body>\n</html>\n"
    )


def _status_reason(verdict: Verdict) -> str:
    return f"findings: {counts_text(verdict.findings)}"


def _rank_text(verdict: Verdict) -> str:
    """'rank 13 of 14: 1 exact dependency', or 'full rank (14 of 14)'."""
    d = verdict.diagnostics
    columns = d.features + 1
    if d.rank >= columns:
        return f"full rank ({d.rank} of {columns} design columns with the intercept)"
    missing = len(d.dependencies) or columns - d.rank
    plural = "dependency" if missing == 1 else "dependencies"
    return f"rank {d.rank} of {columns}: {missing} exact {plural}"


def _glance(verdict: Verdict) -> str:
    t = verdict.table
    features = len(verdict.features)
    return (f"{t.rows_used:,} of {t.rows:,} rows used \u00b7 {features:,} "
            f"design column{'s' if features != 1 else ''} \u00b7 {_rank_text(verdict)}")


# --- great-tables helpers --------------------------------------------------------------------

def _table(rows: list[dict[str, Any]], columns: dict[str, str], table_id: str, *,
           stub: str | None = None, right: Iterable[str] = ()) -> GT:
    """A GT over string cells (escaped by great-tables) with our house style."""
    from great_tables import GT

    texts = {name: [_cell(row.get(name)) for row in rows] for name in columns}
    if frame_library() == "polars":
        import polars as pl

        frame: Any = pl.DataFrame(texts, schema={name: pl.String for name in columns})
    else:
        import pandas as pd

        frame = pd.DataFrame(texts, columns=list(columns), dtype=object)
    table = GT(frame, rowname_col=stub, id=table_id)
    table = table.cols_label(cases={k: v for k, v in columns.items() if k != stub})
    right = [c for c in right if c in columns]
    if right:
        table = table.cols_align("right", columns=right)
    return _style(table)


def _cell(value: Any) -> str | None:
    return None if value is None else str(value)


def _style(table: GT) -> GT:
    return table.tab_options(
        table_font_size="13px", table_font_color="#1d2330",
        table_font_names=["system-ui", "-apple-system", "Segoe UI", "Liberation Sans", "Arial",
                          "sans-serif"],
        column_labels_background_color="#e4e8f0", column_labels_font_weight="bold",
        data_row_padding="4px", table_margin_left="0px", table_border_top_color="#5b6b8c",
        table_body_hlines_color="#e8e6df", source_notes_font_size="12px",
        row_striping_background_color="#f8f7f3", row_striping_include_table_body=True,
    )


def _fragment(table: GT) -> str:
    return str(table.as_raw_html())


def _mark_rows(table: GT, rows: list[int], kind: str, columns: str | list[str]) -> GT:
    from great_tables import loc, style

    if not rows:
        return table
    return table.tab_style(
        style=[style.fill(color=_FILL[kind]), style.text(color=_TEXT[kind], weight="bold")],
        locations=loc.body(columns=columns, rows=rows))


def _note(text: str) -> str:
    return f'<p class="note">{html.escape(text)}</p>'


def _hidden_note(shown: int, total: int, what: str) -> str:
    if total <= shown:
        return ""
    return _note(f"Showing {shown:,} of {total:,} {what}; {total - shown:,} more are hidden "
                 "here. verdict.json lists all of them.")


# --- number text (formatted here, so cells are plain, escaped text) ----------------------

def _num(value: float | None, digits: int = 3) -> str:
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "\u2014"
    if math.isinf(value):
        return "\u221e" if value > 0 else "\u2212\u221e"
    magnitude = abs(value)
    if magnitude != 0 and (magnitude >= 1e5 or magnitude < 1e-3):
        return f"{value:.{digits}g}"
    return f"{value:,.{digits}f}"


def _signed(value: float, digits: int = 3) -> str:
    return f"{value:+.{digits}f}".replace("-", "\u2212")


def _finding_mark(finding: Finding | None, level_if_breach: str | None) -> tuple[str, str]:
    """(cell text, style kind) for a row judged by ``finding`` (None = no finding)."""
    if finding is not None and finding.waived:
        return _WAIVED_MARK, "waived"
    if finding is not None:
        return _LEVEL_MARK.get(finding.level, finding.level), finding.level
    if level_if_breach:
        return _LEVEL_MARK[level_if_breach], level_if_breach
    return _OK_MARK, ""


# --- sections --------------------------------------------------------------------------------

def _provenance_section(verdict: Verdict) -> str:
    t = verdict.table
    p = verdict.policy
    limits = p.limits
    symbol, word, _, _ = _STATUS_STYLE[verdict.status]
    limit_text = " \u00b7 ".join([
        f"|r| \u2265 {limits.pairwise_correlation.max:g} ({limits.pairwise_correlation.level})",
        f"VIF > {limits.vif.max:g} ({limits.vif.level})",
        (f"condition index > {limits.condition_number.max:g} "
         f"({limits.condition_number.level}, "
         f"{limits.condition_number.scaling.replace('_', '-')} scaling)"),
        f"rank deficiency ({limits.rank_deficiency.level})",
    ])
    items = [
        ("Status", f"{symbol} {word} \u2014 {_status_reason(verdict)}"),
        ("Table", t.source),
        ("Table sha256", t.sha256 or "(not a file: no hash)"),
        ("Policy", p.name + (f" ({p.source})" if p.source else "")),
        ("Policy sha256", p.sha256),
        ("Limits", limit_text),
        ("Rows", (f"{t.rows:,} read, {t.rows_used:,} used, {t.rows_dropped:,} dropped for "
                  "missing values")),
        ("Features", f"{len(verdict.features):,} design columns; {_rank_text(verdict)}"),
        ("Weight column", verdict.design.weight or "none"),
        ("Label", verdict.label or "none"),
        ("Checked at (UTC)", verdict.created_at),
        ("Tool version", f"collinearity-gate {verdict.tool_version}"),
    ]
    rows = [{"item": k, "value": v} for k, v in items]
    table = _table(rows, {"item": "", "value": ""}, "verdict", stub="item")
    table = table.tab_options(column_labels_hidden=True)
    table = _mark_rows(table, [0], verdict.status, "value")
    return _fragment(table)


#: Causes before consequences: an exact dependency (or too few rows) explains the infinite
#: VIFs, GVIFs and condition indices that follow from it; pairs are the mildest evidence.
_SUBJECT_ORDER = {subject: rank for rank, subject in enumerate(
    ("dependency", "rows", "structural", "feature", "group", "condition_index", "pair",
     "segment", "waiver"))}


def _finding_order(findings: Sequence[Finding]) -> list[Finding]:
    """Unwaived by level (fail, warn, info), then waived; causes first within a level; the
    judge's order otherwise (stable sort)."""
    order = {level: rank for rank, level in enumerate(LEVELS)}
    return sorted(findings, key=lambda f: (len(LEVELS) if f.waived else order[f.level],
                                           _SUBJECT_ORDER.get(f.subject, len(_SUBJECT_ORDER))))


def _is_infinite_vif(f: Finding) -> bool:
    return f.rule == "vif" and f.subject == "feature" and f.value_kind == "infinite"


def _finding_rows(findings: Sequence[Finding]) -> list[tuple[Finding, tuple[str, ...]]]:
    """One row per finding, except that the infinite-VIF findings of one level and waiver
    state share a row: they are consequences of the exact dependencies listed first."""
    rows: list[tuple[Finding, tuple[str, ...]]] = []
    merged: dict[tuple[str, bool, int | None], int] = {}
    for f in findings:
        if _is_infinite_vif(f):
            key = (f.level, f.waived, f.waiver)
            if key in merged:
                first, names = rows[merged[key]]
                rows[merged[key]] = (first, names + f.features)
                continue
            merged[key] = len(rows)
        rows.append((f, f.features))
    return rows


def _next_steps(verdict: Verdict) -> str:
    """What to do, from the structured findings: causes first, then the remedy command."""
    active = [f for f in verdict.findings if f.counts]
    if not active:
        return ""
    steps: list[str] = []  # already-safe HTML
    dependencies = [f for f in active if f.subject == "dependency"]
    if len(dependencies) == 1:
        steps.append("Resolve the exact dependency first: drop one of its features. The "
                     "infinite VIFs follow from it.")
    elif dependencies:
        steps.append(f"Resolve the {len(dependencies)} exact dependencies first: drop one "
                     "feature of each. The infinite VIFs follow from them.")
    if any(f.subject == "rows" for f in active):
        steps.append("Add rows or drop features: the table has no more rows than design "
                     "columns.")
    command = _suggest_command(verdict)
    what = ("For the smallest set of features to drop so that every fail-level limit passes, "
            "run ")
    steps.append(html.escape(what) + (f"<code>{html.escape(command)}</code>" if command else
                                      "<code>gate suggest</code> on the table file with the "
                                      "same policy") + ".")
    steps.append("A finding you accept on purpose takes a dated waiver in the policy "
                 "(owner, reason, expiry).")
    items = "".join(f"<li>{step}</li>" for step in steps)
    return f'<div class="next" id="next-step"><h3>What to do</h3><ol>{items}</ol></div>'


def _suggest_command(verdict: Verdict) -> str | None:
    """`gate suggest TABLE [--policy FILE]`, quoted for a POSIX shell; None without a file."""
    import shlex

    if verdict.table.sha256 is None:
        return None  # an in-memory table: there is no path to pass
    parts = ["gate", "suggest", shlex.quote(verdict.table.source)]
    source = verdict.policy.source
    if not source or not Path(source).is_file():
        return None  # a policy given as text: the command cannot name it
    if Path(source).resolve() != packaged_policy_path().resolve():
        parts += ["--policy", shlex.quote(source)]  # the packaged default needs no --policy
    return " ".join(parts)


def _findings_section(verdict: Verdict) -> str:
    findings = _finding_order(verdict.findings)
    waivers = verdict.policy.waivers
    parts: list[str] = []
    if not findings:
        parts.append("<p>No findings: every enabled limit holds.</p>")
    else:
        parts.append(_next_steps(verdict))
        grouped = _finding_rows(findings)
        # Capped for size, but information findings carry advice: they are never cut.
        shown = grouped[:MAX_FINDING_ROWS] + [
            row for row in grouped[MAX_FINDING_ROWS:] if row[0].level == "info"
            and not row[0].waived]
        rows: list[dict[str, Any]] = []
        marks: dict[str, list[int]] = {"fail": [], "warn": [], "waived": []}
        for pos, (f, features) in enumerate(shown):
            text, kind = _finding_mark(f, None)
            if kind in marks:
                marks[kind].append(pos)
            waiver = waivers[f.waiver] if f.waiver is not None else None
            if len(features) > len(f.features):  # merged infinite-VIF findings
                message = (f"VIF is infinite for each of these {len(features)} features: "
                           "each is part of an exact dependency (see above and under Exact "
                           "dependencies).")
            else:
                message = f.message
            rows.append({
                "level": text,
                "rule": f.rule,
                "features": ", ".join(features) or "(whole design)",
                "value": _finding_value(f),
                "limit": _finding_limit(f),
                "message": message,
                "waiver": (f"{waiver.owner}: {waiver.reason} (until {waiver.expires.isoformat()})"
                           if waiver is not None else ""),
            })
        columns = {"level": "Result", "rule": "Rule", "features": "Features", "value": "Value",
                   "limit": "Limit", "message": "Detail",
                   "waiver": "Waiver (owner: reason, expiry)"}
        if not any(row["waiver"] for row in rows):  # the column only when a waiver applies
            del columns["waiver"]
            for row in rows:
                del row["waiver"]
        table = _table(rows, columns, "findings", right=["value", "limit"])
        for kind, positions in marks.items():
            table = _mark_rows(table, positions, kind, "level")
        if len(grouped) < len(findings):
            table = table.tab_source_note(
                f"{len(findings):,} findings in {len(grouped):,} rows: the infinite-VIF "
                "findings of one level share a row. Causes come before their consequences.")
        parts.append(_fragment(table))
        parts.append(_hidden_note(len(shown), len(grouped), "finding rows"))
    if verdict.design.notes:
        parts.append('<h3>How the design was built</h3><ul class="design-notes">' + "".join(
            f"<li>{html.escape(n)}</li>" for n in verdict.design.notes) + "</ul>")
    if verdict.waivers:
        state_text = {"active": "\u25cb active", "expired": "\u25b2 expired",
                      "stale": "\u2139 stale (matches no finding)"}
        rows = [{
            "state": state_text[w.state],
            "rule": w.waiver.rule,
            "features": ", ".join(w.waiver.features),
            "owner": w.waiver.owner,
            "reason": w.waiver.reason,
            "expires": w.waiver.expires.isoformat(),
            "covered": str(w.covered),
        } for w in verdict.waivers]
        table = _table(rows, {"state": "State", "rule": "Rule", "features": "Features",
                              "owner": "Owner", "reason": "Reason", "expires": "Expires",
                              "covered": "Findings matched"}, "waivers", right=["covered"])
        table = _mark_rows(table, [i for i, w in enumerate(verdict.waivers)
                                   if w.state == "expired"], "warn", "state")
        parts.append("<h3>Waivers in the policy</h3>" + _fragment(table))
    return "\n".join(p for p in parts if p)


def _finding_value(f: Finding) -> str:
    if f.value is not None:
        return _signed(f.value) if f.subject == "pair" else _num(f.value, 2)
    if f.subject == "dependency":
        return "exact"
    if f.value_kind == "infinite":
        return "\u221e"
    return "undefined" if f.rule in ("vif", "condition_number") else "\u2014"


def _finding_limit(f: Finding) -> str:
    if f.limit is None:
        return "\u2014"
    prefix = {"pairwise_correlation": "|r| \u2265 ", "vif": "> ", "condition_number": "> "}
    return prefix.get(f.rule, "") + f"{f.limit:g}"


def _findings_by_features(verdict: Verdict, rule: str) -> dict[tuple[str, ...], Finding]:
    return {f.features: f for f in verdict.findings if f.rule == rule}


def _features_section(verdict: Verdict) -> str:
    d = verdict.diagnostics
    names = verdict.features
    limit = verdict.policy.limits.vif
    judged = _findings_by_features(verdict, "vif")
    grouped = {k for g in verdict.design.groups for k in g.indices}
    # (breach, sort value, row builder args)
    candidates: list[tuple[bool, float, int]] = []
    for k in range(len(names)):
        if k in grouped:
            continue
        vif = float(d.vif[k])
        candidates.append((not vif <= limit.max, vif if not math.isnan(vif) else math.inf, k))
    for g_pos, result in enumerate(d.groups):
        scaled = result.vif_scale
        candidates.append((not scaled <= limit.max,
                           scaled if not math.isnan(scaled) else math.inf, -1 - g_pos))
    candidates.sort(key=lambda c: (not c[0], -c[1]))
    breaches = [c for c in candidates if c[0]][:MAX_FEATURE_ROWS]
    quiet = [c for c in candidates if not c[0]]
    shown = breaches + quiet[:max(0, min(MAX_QUIET_FEATURE_ROWS,
                                         MAX_FEATURE_ROWS - len(breaches)))]
    rows: list[dict[str, Any]] = []
    marks: dict[str, list[int]] = {"fail": [], "warn": [], "waived": []}
    level_if_breach = limit.level if limit.level != "off" else None
    for pos, (breach, _, k) in enumerate(shown):
        if k >= 0:
            name = names[k]
            row = _feature_row(verdict, k, breach)
        else:
            group = verdict.design.groups[-1 - k]
            name = group.column
            row = _group_row(verdict, -1 - k)
        finding = judged.get((name,))
        text, kind = _finding_mark(finding, level_if_breach if breach else None)
        if level_if_breach is None and not breach:
            text = _OK_MARK
        elif level_if_breach is None:
            text, kind = "limit off", ""
        if kind in marks:
            marks[kind].append(pos)
        rows.append({"feature": name, **row, "result": text})
    columns = {"feature": "Feature", "vif": "VIF",
               "r2": "Auxiliary R\u00b2", "se": "SE inflation \u221aVIF",
               "effective": "Effective rows n/VIF",
               "explained": "Explained mostly by (standardised coefficient)",
               "result": "Result"}
    if not any(row["explained"] for row in rows):
        del columns["explained"]
        for row in rows:
            del row["explained"]
    table = _table(rows, columns, "features", stub="feature",
                   right=["vif", "r2", "se", "effective"])
    from great_tables import loc, style

    table = table.tab_stubhead(label="Feature")
    for kind, positions in marks.items():
        table = _mark_rows(table, positions, kind, ["vif", "result"])
    if "explained" in columns:
        table = table.tab_style(style=style.text(color="#4a5263", size="12px"),
                                locations=loc.body(columns="explained"))
    table = table.tab_source_note(
        f"Breaches of the VIF limit ({'>'} {limit.max:g}, {limit.level}) come first, then the "
        "rest by VIF. Tolerance is 1/VIF = 1 \u2212 auxiliary R\u00b2. Categorical groups show "
        "GVIF^(1/df) in the VIF column and GVIF^(1/(2 df)) as SE inflation (Fox & Monette "
        "1992). \u221e: the feature is part of an exact dependency. Explained mostly by: "
        f"breaching features only, terms with |standardised coefficient| \u2265 "
        f"{EXPLAINED_MIN:g}.")
    total_breaches = sum(1 for c in candidates if c[0])
    hidden = _hidden_note(len(shown), len(candidates), "features and groups")
    if hidden:
        hidden += _note(f"{total_breaches:,} of them breach the limit; "
                        f"{min(total_breaches, len(breaches)):,} of those are shown.")
    return _fragment(table) + hidden


def _feature_row(verdict: Verdict, k: int, breach: bool) -> dict[str, str]:
    d = verdict.diagnostics
    names = verdict.features
    vif = float(d.vif[k])
    if math.isinf(vif) or math.isnan(vif):
        why = ("constant column" if any(dep.kind == "constant" and k in dep.terms
                                        for dep in d.dependencies)
               else "part of an exact dependency (see below)")
        return {"vif": "\u221e", "r2": "1", "se": "\u221e", "effective": "0",
                "explained": why}
    # Only where it helps: breaching features, terms with |standardised coefficient| >= 0.05.
    helpers = ", ".join(f"{names[c]} ({_signed(b, 2)})" for c, b in d.explained_by(k)
                        if abs(b) >= EXPLAINED_MIN) if breach else ""
    return {
        "vif": _num(vif, 2),
        "r2": _num(1.0 - 1.0 / vif, 4) if vif < 1e4 else f"{1.0 - 1.0 / vif:.7f}",
        "se": "\u00d7" + _num(math.sqrt(vif), 2),
        "effective": effective_rows_label(d.rows, vif),
        "explained": helpers,
    }


def _group_row(verdict: Verdict, g: int) -> dict[str, str]:
    group = verdict.design.groups[g]
    result = verdict.diagnostics.groups[g]
    levels = f"group of {result.df} dummies, reference level {group.reference}"
    if math.isnan(result.gvif):
        return {"vif": "undefined", "r2": "\u2014", "se": "\u2014",
                "effective": "\u2014",
                "explained": f"{levels}; a dummy is part of an exact dependency"}
    scaled = result.vif_scale
    return {
        "vif": _num(scaled, 2),
        "r2": "\u2014",
        "se": "\u00d7" + _num(result.adjusted, 2),
        "effective": effective_rows_label(verdict.diagnostics.rows, scaled),
        "explained": f"{levels}; GVIF {_num(result.gvif, 3)}",
    }


def _pairs_section(verdict: Verdict) -> str:
    limit = verdict.policy.limits.pairwise_correlation
    names = verdict.features
    i, j, r = verdict.diagnostics.pairs(limit.max)
    total = int(r.size)
    if total == 0:
        return f"<p>No pair of features has |r| \u2265 {limit.max:g}.</p>"
    judged = _findings_by_features(verdict, "pairwise_correlation")
    level_if_breach = limit.level if limit.level != "off" else None
    rows: list[dict[str, Any]] = []
    marks: dict[str, list[int]] = {"fail": [], "warn": [], "waived": []}
    for pos, (a, b, v) in enumerate(zip(i[:MAX_PAIR_ROWS].tolist(), j[:MAX_PAIR_ROWS].tolist(),
                                        r[:MAX_PAIR_ROWS].tolist())):
        text, kind = _finding_mark(judged.get((names[a], names[b])), level_if_breach)
        if level_if_breach is None:
            text = "limit off"
        if kind in marks:
            marks[kind].append(pos)
        rows.append({"a": names[a], "b": names[b], "r": _signed(v), "abs": f"{abs(v):.3f}",
                     "result": text})
    table = _table(rows, {"a": "Feature", "b": "Feature", "r": "Pearson r", "abs": "|r|",
                          "result": "Result"}, "pairs", right=["r", "abs"])
    for kind, positions in marks.items():
        table = _mark_rows(table, positions, kind, ["abs", "result"])
    table = table.tab_source_note(f"Every pair with |r| \u2265 {limit.max:g}, strongest first.")
    return _fragment(table) + _hidden_note(len(rows), total, "pairs")


def _matrix_features(verdict: Verdict) -> list[int]:
    """Design columns drawn: all when they fit, else those named by findings (design order)."""
    names = verdict.features
    if len(names) <= MAX_MATRIX_FEATURES:
        return list(range(len(names)))
    position = {name: k for k, name in enumerate(names)}
    groups = {g.column: g.indices for g in verdict.design.groups}
    named: set[int] = set()
    for f in verdict.findings:
        if f.subject in ("waiver", "segment"):
            continue
        for name in f.features:
            if name in position:
                named.add(position[name])
            named.update(groups.get(name, ()))
    return sorted(named)[:MAX_MATRIX_FEATURES]


def _matrix_section(verdict: Verdict) -> str:
    names = verdict.features
    chosen = _matrix_features(verdict)
    p = len(chosen)
    subset = p < len(names)
    if len(names) < 2:
        return _note("Fewer than two features: no correlations.")
    if p < 2:
        return _note(f"The full matrix is drawn for at most {MAX_MATRIX_FEATURES} features; "
                     f"this design has {len(names):,} and no finding names two of them. "
                     "verdict.json (with --full-matrices, matrices.npz) holds every "
                     "correlation.")
    from great_tables import loc, style

    corr = verdict.diagnostics.correlation[np.ix_(chosen, chosen)]
    keys = [f"c{k}" for k in range(p)]
    # Numbered columns keep the matrix narrow; the row labels carry number and name. The
    # cells are text formatted here and coloured by _matrix_colours, one style per cell:
    # great-tables' fmt_number and data_color did the same work through its frame and cost
    # 13 ms more per page (a third of the page), which check-files pays per table.
    rows = [{"feature": f"{i + 1}. {names[c]}",
             **{key: _matrix_number(float(corr[i, k])) for k, key in enumerate(keys)}}
            for i, c in enumerate(chosen)]
    table = _table(rows, {"feature": "", **{key: str(k + 1) for k, key in enumerate(keys)}},
                   "matrix", stub="feature", right=keys)
    for k, key in enumerate(keys):
        for i in range(p):
            fill, ink = _matrix_colours(float(corr[i, k]))
            table = table.tab_style(style=[style.text(color=ink), style.fill(color=fill)],
                                    locations=loc.body(columns=key, rows=[i]))
    table = table.tab_options(table_font_size="11px", data_row_padding="2px")
    table = table.tab_source_note(
        "Pearson r between design columns (column k is the feature numbered k): blue "
        "negative, red positive, the number printed in every cell. \u2014: a constant column "
        "has no correlation.")
    if subset:
        table = table.tab_source_note(
            f"This design has {len(names):,} features, more than the {MAX_MATRIX_FEATURES} "
            f"drawn in full: shown are the {p} named by findings, in design order.")
    return _fragment(table)


def _matrix_number(r: float) -> str:
    """Pearson r to two decimals with a typographic minus; an em dash where undefined."""
    if not math.isfinite(r):
        return "\u2014"
    text = f"{r:.2f}"
    return "0.00" if text == "-0.00" else text.replace("-", "\u2212")


def _matrix_colours(r: float) -> tuple[str, str]:
    """Fill and ink of a matrix cell: the fill interpolated linearly in RGB between the
    stops of _MATRIX_PALETTE, spread evenly over r in [-1, 1] (NaN: _MATRIX_MISSING); the
    ink black or white, whichever contrasts more with the fill by the WCAG 2 contrast ratio
    (relative luminance, https://www.w3.org/TR/WCAG21/#dfn-contrast-ratio)."""
    if not math.isfinite(r):
        return _MATRIX_MISSING, "#000000"
    stops = [tuple(int(c[i:i + 2], 16) for i in (1, 3, 5)) for c in _MATRIX_PALETTE]
    where = (min(max(r, -1.0), 1.0) + 1.0) / 2.0 * (len(stops) - 1)
    low = min(int(where), len(stops) - 2)
    share = where - low
    rgb = [round(a + (b - a) * share) for a, b in zip(stops[low], stops[low + 1])]
    fill = "#" + "".join(f"{c:02x}" for c in rgb)

    def linear(c: float) -> float:
        c /= 255.0
        return c / 12.92 if c <= 0.04045 else ((c + 0.055) / 1.055) ** 2.4

    luminance = 0.2126 * linear(rgb[0]) + 0.7152 * linear(rgb[1]) + 0.0722 * linear(rgb[2])
    against_black = (luminance + 0.05) / 0.05
    against_white = 1.05 / (luminance + 0.05)
    return fill, ("#000000" if against_black >= against_white else "#ffffff")


def _condition_section(verdict: Verdict) -> str:
    """Belsley-Kuh-Welsch table with the design columns in rows and one column per condition
    index (the largest few), so that its width does not grow with the number of features."""
    d = verdict.diagnostics
    cond = d.condition
    limit = verdict.policy.limits.condition_number
    names = verdict.features
    count = int(cond.indices.size)
    if count == 0:
        return _note("No condition indices (no non-constant design columns).")
    order = list(range(count - 1, -1, -1))  # largest first
    breaching = [k for k in order if index_breaches(float(cond.indices[k]), limit.max)]
    shown = order[:min(max(len(breaching) + 1, MIN_CONDITION_INDICES), MAX_CONDITION_INDICES)]
    judged = [k for k in shown if k in breaching]
    props = {k: cond.shares(k) for k in shown}
    width = len(cond.columns)
    involved = {c for k in judged for c in range(width) if props[k][c] >= limit.proportion}
    peak = np.vstack([props[k] for k in shown]).max(axis=0)
    # Involved columns first (design order, intercept first), then by largest proportion.
    ordered = sorted(range(width), key=lambda c: (c not in involved,
                                                  0.0 if c in involved else -float(peak[c]), c))
    rows_shown = ordered[:MAX_CONDITION_ROWS]
    keys = [f"k{k}" for k in shown]
    labels = {}
    for k, key in zip(shown, keys):
        value = _num(float(cond.indices[k]), 1)
        over = k in breaching
        labels[key] = (f"{value} {_LEVEL_MARK[limit.level]}"
                       if over and limit.level != "off" else value)
    rows: list[dict[str, Any]] = []
    marked: dict[str, list[int]] = {key: [] for key in keys}
    for pos, c in enumerate(rows_shown):
        column = cond.columns[c]
        row: dict[str, Any] = {"column": INTERCEPT_NAME if column == INTERCEPT else names[column]}
        for k, key in zip(shown, keys):
            share = float(props[k][c])
            hit = k in judged and share >= limit.proportion
            row[key] = f"{share:.2f}" + (_PROPORTION_MARK if hit else "")
            if hit:
                marked[key].append(pos)
        rows.append(row)
    table = _table(rows, {"column": "Design column", **labels}, "condition", stub="column",
                   right=keys)
    table = table.tab_stubhead(label="Design column")
    table = table.tab_spanner(label="Condition index (largest first): variance-decomposition "
                              "proportions", columns=keys)
    level_kind = limit.level if limit.level in ("fail", "warn") else "waived"
    for key, positions in marked.items():
        table = _mark_rows(table, positions, level_kind, key)
    over_keys = [key for k, key in zip(shown, keys) if k in breaching]
    if over_keys:
        from great_tables import loc, style

        table = table.tab_style(
            style=[style.fill(color=_FILL[level_kind]),
                   style.text(color=_TEXT[level_kind], weight="bold")],
            locations=loc.column_labels(columns=over_keys))
    scaling = "unit-length columns" if cond.scaling == "unit_length" else "standardised columns"
    reduced = (f" Computed {removed_text(len(d.dependencies))} (one column each; the full "
               "design's condition number is \u221e)." if cond.reduced else "")
    explain = _note(
        f"Belsley, Kuh & Welsch (1980): {scaling} with an intercept. Each column is one "
        f"condition index; an index over {limit.max:g} is marked in its heading. "
        f"\u25c6 marks proportions \u2265 {limit.proportion:g} under such an index: those "
        f"design columns share the near dependency and are listed first.{reduced}")
    number = d.condition_number
    largest = _num(float(cond.indices[order[0]]), 1)
    if cond.reduced:
        value = (f"infinite (the design has exact dependencies); {largest} after dropping one "
                 "column per exact dependency")
    else:
        value = _num(number, 1) if number is not None else "infinite"
    head = _note(f"Condition number: {value} (limit {limit.max:g}, {limit.level}); "
                 f"{len(breaching)} of {count:,} indices over the limit.")
    notes = ""
    if len(shown) < count:
        notes += _note(f"Showing the {len(shown)} largest of {count:,} condition indices. "
                       "verdict.json lists every index and the proportions of every "
                       "breaching one.")
    if len(rows_shown) < width:
        notes += _note(f"Showing {len(rows_shown)} of {width:,} design columns: those "
                       "involved first, then by their largest proportion.")
    return head + _fragment(table) + explain + notes


def _dependencies_section(verdict: Verdict) -> str:
    deps = verdict.diagnostics.dependencies
    names = verdict.features
    if not deps:
        return "<p>None: the design has full rank (no constant, duplicate or exactly " \
               "dependent columns).</p>"
    kind_text = {"constant": "constant column", "duplicate": "duplicate", "linear": "linear"}
    shown = deps[:MAX_DEPENDENCY_ROWS]
    rows = [{"kind": kind_text.get(dep.kind, dep.kind),
             "relation": describe_dependency(dep, names).split(": ", 1)[-1],
             "features": str(len(dep.terms))} for dep in shown]
    table = _table(rows, {"kind": "Kind", "relation": "Relation (holds in every used row)",
                          "features": "Features"}, "dependencies", right=["features"])
    table = table.tab_source_note(
        f"Rank of the design: {verdict.diagnostics.rank} of "
        f"{verdict.diagnostics.features + 1} columns (relative tolerance "
        f"{verdict.diagnostics.rank_tolerance:.2g}). Coefficients are rounded for display.")
    return _fragment(table) + _hidden_note(len(shown), len(deps), "dependencies")


def _missing_section(verdict: Verdict) -> str:
    design = verdict.design
    t = verdict.table
    grouped = {k for g in design.groups for k in g.indices}
    columns = [n for k, n in enumerate(design.features) if k not in grouped]
    columns += [g.column for g in design.groups]
    if design.weight:
        columns.append(design.weight)
    columns += [c for c in t.missing if c not in columns]
    counts = {c: int(t.missing.get(c, 0)) for c in columns}
    policy = verdict.policy.missing
    ordered = sorted((c for c in columns if counts[c] > 0), key=lambda c: -counts[c])
    if not ordered:
        return _note(f"No missing values in the {len(columns):,} columns the design reads "
                     f"(missing-value policy: {policy}).")
    shown = ordered[:MAX_MISSING_ROWS]
    rows = [{"column": c, "missing": f"{counts[c]:,}",
             "share": f"{100.0 * counts[c] / t.rows:.1f} %" if t.rows else "\u2014"}
            for c in shown]
    table = _table(rows, {"column": "Column", "missing": "Missing values",
                          "share": "Share of rows read"}, "missing",
                   right=["missing", "share"])
    table = table.tab_source_note(
        f"Only the columns with missing values: {len(ordered):,} of the {len(columns):,} the "
        f"design reads. Missing-value policy: {policy}. {t.rows_dropped:,} of {t.rows:,} rows "
        "were dropped; a row counts once even when several of its columns are missing.")
    return _fragment(table) + _hidden_note(len(shown), len(ordered), "columns with missing "
                                           "values")


def _segments_section(verdict: Verdict) -> str:
    """Segment overview (policy `segments`): one row per segment, failing ones first."""
    order = {"fail": 0, "warn": 1, "pass": 2, "not_judged": 3}
    segments = sorted(verdict.segments, key=lambda s: (order.get(s.status, 4), s.label))
    rows: list[dict[str, Any]] = []
    marks: dict[str, list[int]] = {"fail": [], "warn": []}
    for pos, segment in enumerate(segments):
        inner = segment.verdict
        if inner is None:
            rows.append({"segment": segment.label, "rows": f"{segment.rows_used:,}",
                         "status": "not judged", "worst_vif": "\u2014", "effective": "\u2014",
                         "detail": segment.reason or ""})
            continue
        finite = [float(v) for v in inner.diagnostics.vif if math.isfinite(float(v))]
        worst = max(inner.diagnostics.vif.tolist(), default=1.0)
        active = [f for f in _finding_order(inner.findings) if f.counts]  # cause first
        rows.append({
            "segment": segment.label, "rows": f"{segment.rows_used:,}",
            "status": inner.status,
            "worst_vif": _num(worst, 2),
            "effective": effective_rows_label(inner.diagnostics.rows, max(finite, default=1.0))
            if not math.isinf(worst) else "0",
            "detail": active[0].message if active else "",
        })
        if inner.status in marks:
            marks[inner.status].append(pos)
    if not rows:
        return _note("The policy segments the table, but no segment has rows.")
    columns = {"segment": "Segment", "rows": "Rows used", "status": "Status",
               "worst_vif": "Largest VIF", "effective": "Fewest effective rows (n/VIF)",
               "detail": "Worst finding"}
    table = _table(rows, columns, "segments", stub="segment",
                   right=["rows", "worst_vif", "effective"])
    table = table.tab_stubhead(label="Segment")
    for kind, positions in marks.items():
        table = _mark_rows(table, positions, kind, ["status"])
    spec = verdict.policy.segments
    table = table.tab_source_note(
        "The whole gate runs per segment and on the whole table; the table's status is the "
        "worst of them. Segments with fewer used rows than segments.min_rows "
        f"({spec.min_rows if spec else '?'}) are reported, not judged. More rows only help a "
        "coefficient if the new rows move its features apart.")
    return _fragment(table)
