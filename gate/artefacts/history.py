"""`gate history`: what changed between checks, when, and which waivers cover it.

Reads an audit log (with its verdict store, see :mod:`gate.artefacts.audit`) or a folder of
verdict.json files, and writes history.json (every figure) and history.html (the same, with
charts). Runs are grouped by table source and policy name, never mixed.

Memory stays bounded by the number of runs, not by the size of the verdicts: each verdict is
read, reduced to one :class:`Run` (a few numbers, its VIFs as two small arrays, its findings as
interned keys) and dropped.

Exit codes: 0 when the record is complete; 1 when the audit chain is broken or a stored verdict
is missing or altered (the page still renders and marks it); 2 on unusable input.
"""

from __future__ import annotations

import datetime as dt
import fnmatch
import hashlib
import json
import math
import multiprocessing
import os
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from gate.artefacts.audit import (
    SUMMARY_SUFFIX,
    ChainReport,
    entry_problem,
    parse_line,
    read_lines,
    store_path,
    summary_document,
    verify_chain,
)
from gate.errors import GateError, OutputError
from gate.judge.diff import FindingKey, finding_key
from gate.judge.rules import WAIVER_EXPIRY_HORIZON_DAYS

HISTORY_VERSION = 1
LEVELS = ("fail", "warn", "info")
def finding_identity(finding: dict[str, Any]) -> FindingKey:
    """The identity of a finding across runs: the same as `gate diff` uses
    (:func:`gate.judge.diff.finding_key`: rule, subject, sorted features, segment)."""
    return finding_key(finding)


def describe_identity(key: FindingKey) -> str:
    rule, _, features, segment = key
    where = f" in segment {segment}" if segment is not None else ""
    return f"{rule}: {', '.join(features) or '(table)'}{where}"


@dataclass
class Run:
    """One check, reduced to what the history shows."""

    where: str  # "line 12" of the log, or the verdict file
    created_at: str
    moment: dt.datetime | None
    label: str | None
    status: str
    table: str
    table_sha256: str | None
    policy_name: str
    policy_sha256: str | None
    problem: str | None = None  # "verdict missing", ...
    counts: dict[str, int] = field(default_factory=dict)
    waived: int = 0
    max_vif: float | None = None  # math.inf for an infinite VIF
    max_vif_feature: str | None = None
    vif_limit: float | None = None
    condition_number: float | None = None
    rank_deficient: bool = False
    vif_index: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int32))
    vif_value: np.ndarray = field(default_factory=lambda: np.zeros(0))
    findings: frozenset[int] = frozenset()
    breaching: frozenset[int] = frozenset()  # features with a fail/warn VIF finding
    after_break: bool = False
    line: int = 0  # of the audit log (0 for a verdict file)


@dataclass
class Interner:
    """Strings and finding keys as small ints, shared by all runs."""

    names: dict[str, int] = field(default_factory=dict)
    keys: dict[FindingKey, int] = field(default_factory=dict)

    def name(self, text: str) -> int:
        return self.names.setdefault(text, len(self.names))

    def feature_name(self, index: int) -> str:
        if len(self._by_index) != len(self.names):
            self._by_index = list(self.names)
        return self._by_index[index]

    def key(self, key: FindingKey) -> int:
        return self.keys.setdefault(key, len(self.keys))

    raw: dict[Any, int] = field(default_factory=dict)
    sets: dict[frozenset[int], frozenset[int]] = field(default_factory=dict)

    def finding(self, finding: dict[str, Any]) -> int:
        """The id of :func:`finding_identity` of ``finding``, memoised on its raw fields."""
        features = finding.get("features")
        try:
            raw = (finding.get("rule"), tuple(features) if isinstance(features, list) else None,
                   finding.get("segment"))
            known = self.raw.get(raw)
        except TypeError:  # an unhashable foreign value: no memo
            return self.key(finding_identity(finding))
        if known is None:
            known = self.raw[raw] = self.key(finding_identity(finding))
        return known

    _last_names: tuple[str, ...] = ()
    _by_index: list[str] = field(default_factory=list)
    _last_index: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int32))

    def vif_arrays(self, vif: dict[str, Any]) -> tuple[np.ndarray, np.ndarray]:
        """(feature ids, values) of a verdict's VIF map; null -> inf, non-numbers -> NaN.
        Consecutive runs mostly share their features, so the ids are reused when they do."""
        names = tuple(vif)
        if names != self._last_names:
            self._last_names = names
            self._last_index = np.fromiter((self.name(str(k)) for k in names), np.int32,
                                           len(names))
        values = list(vif.values())
        try:
            if None in values:  # numpy would read null as NaN; it means infinite here
                raise TypeError
            value = np.array(values, dtype=np.float64)
            if value.shape != (len(names),):
                raise TypeError
        except (TypeError, ValueError):  # null (infinite) or a foreign value
            value = np.fromiter((math.inf if v is None else (_number(v) or math.nan)
                                 for v in vif.values()), np.float64, len(names))
        return self._last_index, value


@dataclass
class WaiverSeen:
    rule: str
    features: tuple[str, ...]
    owner: str
    reason: str
    expires: str
    first_seen: str
    last_seen: str
    last_state: str
    runs: int = 0


@dataclass
class Group:
    table: str
    policy_name: str
    runs: list[Run] = field(default_factory=list)
    waivers: dict[tuple[str, tuple[str, ...], str, str], WaiverSeen] = field(default_factory=dict)
    derived: dict[Any, Any] = field(default_factory=dict, repr=False)  # memo of derived views


@dataclass
class History:
    source: str
    kind: str  # "audit-log" or "folder"
    generated_at: str
    today: dt.date
    horizon: int
    filters: dict[str, str | None]
    chain: ChainReport | None
    record_problems: list[dict[str, Any]]
    notes: list[str]
    groups: list[Group]
    interner: Interner

    @property
    def exit_code(self) -> int:
        broken = self.chain is not None and not self.chain.chain_ok
        return 1 if broken or self.record_problems else 0

    def feature_names(self) -> list[str]:
        return list(self.interner.names)

    def key_list(self) -> list[FindingKey]:
        return list(self.interner.keys)


# ----------------------------------------------------------------------------- reading


def _number(value: Any) -> float | None:
    """A JSON number as float (None for null, strings, bools and the like)."""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return None
    number = float(value)
    return number if math.isfinite(number) else None


def _moment(text: str) -> dt.datetime | None:
    try:
        moment = dt.datetime.fromisoformat(text)
    except ValueError:
        return None
    if moment.tzinfo is None:
        moment = moment.replace(tzinfo=dt.UTC)
    return moment.astimezone(dt.UTC)


def reduce_verdict(document: dict[str, Any], where: str, interner: Interner) -> Run:
    """One verdict.json document -> a :class:`Run` (tolerant: odd fields become None)."""
    table = document.get("table") if isinstance(document.get("table"), dict) else {}
    policy = document.get("policy") if isinstance(document.get("policy"), dict) else {}
    assert isinstance(table, dict) and isinstance(policy, dict)
    created = str(document.get("created_at", ""))
    limits = policy.get("limits") if isinstance(policy.get("limits"), dict) else {}
    vif_limit = None
    if isinstance(limits, dict) and isinstance(limits.get("vif"), dict):
        vif_limit = _number(limits["vif"].get("max"))
    label = document.get("label")
    run = Run(where=where, created_at=created, moment=_moment(created),
              label=None if label is None else str(label),
              status=str(document.get("status", "?")), table=str(table.get("source", "?")),
              table_sha256=_str_or_none(table.get("sha256")),
              policy_name=str(policy.get("name", "?")),
              policy_sha256=_str_or_none(policy.get("sha256")), vif_limit=vif_limit)
    diagnostics = document.get("diagnostics")
    diagnostics = diagnostics if isinstance(diagnostics, dict) else {}
    vif = diagnostics.get("vif")
    if isinstance(vif, dict) and vif:
        index, value = interner.vif_arrays(vif)
        run.vif_index, run.vif_value = index, value
        finite = np.where(np.isnan(value), -1.0, value)
        top = int(np.argmax(finite))
        if finite[top] >= 0:
            run.max_vif = float(finite[top])
            run.max_vif_feature = interner.feature_name(int(index[top]))
    run.condition_number = _number(diagnostics.get("condition_number"))
    run.rank_deficient = diagnostics.get("condition_number", 0) is None
    counts = dict.fromkeys(LEVELS, 0)
    keys: set[int] = set()
    breaching: set[int] = set()
    findings = document.get("findings")
    for finding in findings if isinstance(findings, list) else []:
        if not isinstance(finding, dict):
            continue
        level = str(finding.get("level"))
        if finding.get("waived") is True:
            run.waived += 1
        elif level in counts:
            counts[level] += 1
        if level in ("fail", "warn"):
            keys.add(interner.finding(finding))
            if finding.get("rule") == "vif" and isinstance(finding.get("features"), list):
                breaching.update(interner.name(str(f)) for f in finding["features"])
    run.counts = counts
    # Consecutive runs mostly share their findings: keep one copy of each set.
    run.findings = interner.sets.setdefault(frozenset(keys), frozenset(keys))
    run.breaching = interner.sets.setdefault(frozenset(breaching), frozenset(breaching))
    return run


def _str_or_none(value: Any) -> str | None:
    return None if value is None else str(value)


def _waivers(document: dict[str, Any]) -> Iterator[dict[str, Any]]:
    waivers = document.get("waivers")
    for waiver in waivers if isinstance(waivers, list) else []:
        if isinstance(waiver, dict):
            yield waiver


def _runs_from_log(log: Path, interner: Interner, record_problems: list[dict[str, Any]],
                   notes: list[str]) -> Iterator[tuple[Run, dict[str, Any]]]:
    """The runs of a log. A stored verdict is always re-hashed (a missing or altered one is a
    record problem); its fields are read from its summary when the entry records a summary
    whose bytes still hash to it (a few KiB of JSON instead of the whole verdict), else from
    the verdict itself."""
    unusable: list[str] = []
    store = str(store_path(log, "0" * 64).parent)
    for number, line, complete in read_lines(log):
        if not complete:
            continue  # the torn tail: the chain report names it
        entry = parse_line(line)
        if isinstance(entry, str):
            continue  # the chain report names the first such line
        if entry_problem(entry) is not None:
            continue  # the chain report names the first such line
        legacy = "format" not in entry
        if legacy:
            run = Run(where=f"line {number}", created_at=str(entry["time"]),
                      moment=_moment(str(entry["time"])), label=entry["label"],
                      status=str(entry["status"]), table=str(entry["table"]),
                      table_sha256=entry["table_sha256"], policy_name="(first-form log entry)",
                      policy_sha256=entry["policy_sha256"],
                      problem="first-form entry: no stored verdict")
            document: dict[str, Any] = {}
        else:
            sha = entry["verdict"]["sha256"]
            kept = os.path.join(store, f"{sha}.json")  # = store_path(log, sha), cheaper
            problem = None
            document = {}
            try:
                with open(kept, "rb") as handle:
                    data = handle.read()
            except FileNotFoundError:
                problem = "stored verdict missing"
            except OSError as exc:
                problem = f"stored verdict unreadable ({exc.strerror or exc})"
            else:
                if hashlib.sha256(data).hexdigest() != sha:
                    problem = "stored verdict altered (its sha256 no longer matches)"
                else:
                    summary, why = _read_summary(store, entry["verdict"], sha)
                    parsed = summary if summary is not None else _parse_document(data)
                    if why is not None:
                        unusable.append(f"line {number} ({why})")
                    if parsed is None:
                        problem = "stored verdict is not a verdict.json"
                    else:
                        document = parsed
            if problem is not None:
                record_problems.append({"line": number, "sha256": sha, "problem": problem,
                                        "path": str(kept)})
                table, policy = entry["table"], entry["policy"]
                run = Run(where=f"line {number}", created_at=str(entry["created_at"]),
                          moment=_moment(str(entry["created_at"])), label=entry["label"],
                          status=str(entry["status"]),
                          table=str(table.get("source") if isinstance(table, dict) else "?"),
                          table_sha256=None,
                          policy_name=str(policy.get("name") if isinstance(policy, dict)
                                          else "?"),
                          policy_sha256=_str_or_none(policy.get("sha256")
                                                     if isinstance(policy, dict) else None),
                          problem=problem)
            else:
                run = reduce_verdict(document, f"line {number}", interner)
        run.line = number
        yield run, document
    if unusable:
        shown = ", ".join(unusable[:3]) + (f" and {len(unusable) - 3} more"
                                           if len(unusable) > 3 else "")
        notes.append(f"{len(unusable)} stored run summar{'ies' if len(unusable) > 1 else 'y'} "
                     f"could not be used ({shown}); those runs were read from their full "
                     "stored verdicts instead, so the figures are unaffected (the summaries "
                     "are derived data, not part of the record)")


def _read_summary(store: str, field: dict[str, Any], sha: str
                  ) -> tuple[dict[str, Any] | None, str | None]:
    """(the pruned verdict kept as the summary of verdict ``sha``, None) when the entry
    records one and it hashes to the recorded ``summary_sha256``; else (None, why) to fall
    back on the verdict; (None, None) when no summary was recorded (older entries)."""
    expected = field.get("summary_sha256")
    if expected is None:
        return None, None
    try:  # the file summary_path(log, sha) names
        with open(os.path.join(store, f"{sha}{SUMMARY_SUFFIX}"), "rb") as handle:
            data = handle.read()
    except FileNotFoundError:
        return None, "summary missing"
    except OSError as exc:
        return None, f"summary unreadable: {exc.strerror or exc}"
    if hashlib.sha256(data).hexdigest() != expected:
        return None, "summary altered: its sha256 differs from the one in the entry"
    try:
        value = json.loads(data)
    except (ValueError, RecursionError):
        value = None
    document = summary_document(value) if isinstance(value, dict) and \
        value.get("verdict_sha256") == sha else None
    if document is None or "status" not in document or "created_at" not in document:
        return None, "summary of another form or another verdict"
    return document, None


def _parse_document(data: bytes) -> dict[str, Any] | None:
    try:
        value = json.loads(data)
    except (ValueError, RecursionError):
        return None
    if not isinstance(value, dict) or "status" not in value or "created_at" not in value:
        return None
    return value


def _runs_from_folder(folder: Path, interner: Interner, notes: list[str]
                      ) -> Iterator[tuple[Run, dict[str, Any]]]:
    try:
        files = sorted(p for p in folder.rglob("*.json") if p.is_file())
    except OSError as exc:
        raise OutputError(f"{folder}: cannot list the folder ({exc.strerror or exc})") from None
    skipped = 0
    for path in files:
        try:
            data = path.read_bytes()
        except OSError:
            skipped += 1
            continue
        document = _parse_document(data)
        if document is None or "diagnostics" not in document:
            skipped += 1
            continue
        yield reduce_verdict(document, str(path.relative_to(folder)), interner), document
    if skipped:
        notes.append(f"{skipped} .json file{'s' if skipped > 1 else ''} in the folder "
                     f"{'are' if skipped > 1 else 'is'} not a verdict.json and "
                     f"{'were' if skipped > 1 else 'was'} skipped")
    if not files:
        notes.append("the folder holds no .json files")


def _verify_alongside(log: Path) -> Callable[[], ChainReport]:
    """Start checking the log's chain in a second process (the reading of the runs goes on
    meanwhile; each costs about a second at 10,000 entries); return the wait for its report.
    With one CPU, or where fork is unavailable, the chain is checked here, first."""
    if (os.cpu_count() or 1) < 2 or "fork" not in multiprocessing.get_all_start_methods():
        report = verify_chain(log, check_store=False)
        return lambda: report
    pool = multiprocessing.get_context("fork").Pool(1)
    pending = pool.apply_async(verify_chain, (log,), {"check_store": False})

    def wait() -> ChainReport:
        try:
            report: ChainReport = pending.get()
            return report
        finally:
            pool.close()
            pool.join()

    return wait


def parse_day(text: str | None, option: str) -> dt.date | None:
    if text is None:
        return None
    try:
        return dt.date.fromisoformat(text)
    except ValueError:
        pass
    try:
        moment = dt.datetime.fromisoformat(text)
    except ValueError:
        raise GateError(f"{option} {text[:40]!r}: not a date; give it as YYYY-MM-DD") from None
    return moment.date()


def build_history(source: str | Path, *, horizon: int = WAIVER_EXPIRY_HORIZON_DAYS, since: str | None = None,
                  until: str | None = None, label: str | None = None,
                  today: dt.date | None = None) -> History:
    """Read the runs of an audit log or a folder of verdicts into grouped history."""
    path = Path(source)
    if horizon < 0:
        raise GateError(f"--horizon {horizon}: must be 0 or more days")
    first, last = parse_day(since, "--since"), parse_day(until, "--until")
    if first is not None and last is not None and first > last:
        raise GateError(f"--since {first} is after --until {last}; swap them")
    interner = Interner()
    record_problems: list[dict[str, Any]] = []
    notes: list[str] = []
    chain: ChainReport | None = None
    if path.is_dir():
        kind = "folder"
        runs: Iterator[tuple[Run, dict[str, Any]]] = _runs_from_folder(path, interner, notes)
    elif path.is_file():
        kind = "audit-log"
        verified = _verify_alongside(path)
        runs = _runs_from_log(path, interner, record_problems, notes)
    elif path.exists():
        raise GateError(f"{path}: not a file or folder; give an audit log or a folder of "
                        "verdict.json files")
    else:
        raise GateError(f"{path}: not found; give an audit log or a folder of verdict.json "
                        "files")
    groups: dict[tuple[str, str], Group] = {}
    filtered = 0
    for run, document in runs:
        day = run.moment.date() if run.moment is not None else None
        if (first is not None and (day is None or day < first)) or \
                (last is not None and (day is None or day > last)) or \
                (label is not None and not fnmatch.fnmatchcase(run.label or "", label)):
            filtered += 1
            continue
        group = groups.setdefault((run.table, run.policy_name),
                                  Group(run.table, run.policy_name))
        group.runs.append(run)
        for waiver in _waivers(document):
            features = waiver.get("features")
            names = tuple(str(f) for f in features) if isinstance(features, list) else ()
            key = (str(waiver.get("rule")), names, str(waiver.get("owner")),
                   str(waiver.get("expires")))
            seen = group.waivers.get(key)
            if seen is None:
                seen = group.waivers[key] = WaiverSeen(
                    key[0], names, key[2], str(waiver.get("reason", "")), key[3],
                    run.created_at, run.created_at, str(waiver.get("state")))
            seen.last_seen, seen.last_state = run.created_at, str(waiver.get("state"))
            seen.runs += 1
    if kind == "audit-log":
        chain = verified()
        if chain.bad_line is not None:
            for group in groups.values():
                for run in group.runs:
                    run.after_break = run.line >= chain.bad_line
    if filtered:
        notes.append(f"{filtered} run{'s' if filtered > 1 else ''} left out by the filters")
    ordered = []
    for group_key in sorted(groups):
        group = groups[group_key]
        if kind == "folder":  # a log is already in its own (chained) order
            group.runs.sort(key=lambda r: (r.moment or dt.datetime.min.replace(tzinfo=dt.UTC),
                                           r.where))
        ordered.append(group)
    return History(
        source=str(path), kind=kind,
        generated_at=dt.datetime.now(dt.UTC).isoformat(timespec="seconds"),
        today=today or dt.datetime.now(dt.UTC).date(), horizon=horizon,
        filters={"since": since, "until": until, "label": label}, chain=chain,
        record_problems=record_problems, notes=notes, groups=ordered, interner=interner)


# ----------------------------------------------------------------------------- derived views


def changes(group: Group) -> Iterator[tuple[int, list[int], list[int]]]:
    """(run position, appeared keys, resolved keys) between consecutive runs with verdicts."""
    previous: Run | None = None
    for pos, run in enumerate(group.runs):
        if run.problem is not None:
            continue  # nothing known about its findings
        if previous is not None:
            appeared = sorted(run.findings - previous.findings)
            resolved = sorted(previous.findings - run.findings)
            if appeared or resolved:
                yield pos, appeared, resolved
        previous = run


def policy_changes(group: Group) -> list[bool]:
    """For each run: did its policy sha256 differ from the previous run's?"""
    out, last = [], None
    for run in group.runs:
        out.append(last is not None and run.policy_sha256 != last)
        last = run.policy_sha256
    return out


def breached_features(group: Group) -> list[int]:
    """Features that ever breached (a fail/warn VIF finding), worst peak first.

    A feature's peak is its largest VIF over the runs that had a breaching feature, from the
    run where it first breached on."""
    cached = group.derived.get("breached")
    if cached is not None:
        return list(cached)
    first: dict[int, int] = {}
    breaching_runs = np.zeros(len(group.runs), dtype=bool)
    for pos, run in enumerate(group.runs):
        if run.breaching:
            breaching_runs[pos] = True
            for index in run.breaching:
                first.setdefault(index, pos)
    features = list(first)
    series = vif_series(group, features)
    counted = breaching_runs[:, None] & (np.arange(len(group.runs))[:, None]
                                         >= np.array([first[f] for f in features])[None, :])
    values = np.where(counted & ~np.isnan(series), series, -np.inf).reshape(len(group.runs),
                                                                            len(features))
    peak = np.maximum(values.max(axis=0, initial=-np.inf), 0.0)
    peaks = dict(zip(features, peak.tolist()))
    ordered = sorted(peaks, key=lambda k: (-peaks[k], k))
    group.derived["breached"] = ordered
    return list(ordered)


def vif_series(group: Group, features: list[int]) -> np.ndarray:
    """runs x features VIF matrix (NaN where a run has no value; inf for infinite)."""
    key = ("series", tuple(features))
    cached = group.derived.get(key)
    if cached is not None:
        return cached.copy()  # type: ignore[no-any-return]
    out = np.full((len(group.runs), len(features)), np.nan)
    if features:
        top = max(features)
        column = np.full(top + 1, -1, dtype=np.int64)
        column[np.array(features, dtype=np.int64)] = np.arange(len(features))
        layouts: dict[int, tuple[np.ndarray, np.ndarray, np.ndarray]] = {}
        for r, run in enumerate(group.runs):
            index = run.vif_index
            if not index.size:
                continue
            # Runs with the same features share one index array (Interner.vif_arrays).
            known = layouts.get(id(index))
            if known is None or known[0] is not index:
                inside = index <= top
                columns = np.full(index.size, -1, dtype=np.int64)
                columns[inside] = column[index[inside]]
                wanted = columns >= 0
                known = layouts[id(index)] = (index, wanted, columns[wanted])
            _, wanted, columns = known
            out[r, columns] = run.vif_value[wanted]
    group.derived[key] = out
    return out.copy()


def waiver_rows(group: Group, today: dt.date, horizon: int) -> list[tuple[str, WaiverSeen]]:
    """(kind, waiver): expiring within the horizon first, then expired, then active."""
    order = {"expiring": 0, "expired": 1, "active": 2, "unknown": 3}
    rows = []
    for seen in group.waivers.values():
        try:
            expires = dt.date.fromisoformat(seen.expires)
        except ValueError:
            rows.append(("unknown", seen))
            continue
        if expires < today:
            kind = "expired"
        elif (expires - today).days <= horizon:
            kind = "expiring"
        else:
            kind = "active"
        rows.append((kind, seen))
    rows.sort(key=lambda row: (order[row[0]], row[1].expires, row[1].rule, row[1].features))
    return rows


# ----------------------------------------------------------------------------- history.json


def _json_number(value: float | None) -> float | str | None:
    if value is None or math.isnan(value):
        return None
    return "inf" if math.isinf(value) else value


def history_document(history: History) -> dict[str, Any]:
    names = history.feature_names()
    keys = history.key_list()
    chain = history.chain
    groups = []
    for group in history.groups:
        changed = policy_changes(group)
        features = breached_features(group)
        series = vif_series(group, features)
        groups.append({
            "table": group.table, "policy_name": group.policy_name, "runs_count": len(group.runs),
            "runs": [{
                "where": run.where, "created_at": run.created_at, "label": run.label,
                "status": run.status, "problem": run.problem, "after_chain_break": run.after_break,
                "counts": {**run.counts, "waived": run.waived},
                "max_vif": _json_number(run.max_vif), "max_vif_feature": run.max_vif_feature,
                "condition_number": run.condition_number,
                "table_sha256": run.table_sha256, "policy_sha256": run.policy_sha256,
                "policy_changed": changed[pos]}
                for pos, run in enumerate(group.runs)],
            "changes": [{
                "run": pos, "created_at": group.runs[pos].created_at,
                "appeared": [describe_identity(keys[k]) for k in appeared],
                "resolved": [describe_identity(keys[k]) for k in resolved]}
                for pos, appeared, resolved in changes(group)],
            "vif_over_time": {
                "note": "VIF per run for every feature that ever breached; null = no value in "
                        "that run, \"inf\" = infinite (an exact dependency)",
                "series": {names[f]: [_json_number(v) for v in series[:, c].tolist()]
                           for c, f in enumerate(features)}},
            "waivers": [{
                "kind": kind, "rule": w.rule, "features": list(w.features), "owner": w.owner,
                "reason": w.reason, "expires": w.expires, "first_seen": w.first_seen,
                "last_seen": w.last_seen, "last_state": w.last_state, "runs": w.runs}
                for kind, w in waiver_rows(group, history.today, history.horizon)],
        })
    return {
        "history_version": HISTORY_VERSION,
        "generated_at": history.generated_at,
        "source": history.source, "kind": history.kind,
        "today": history.today.isoformat(), "horizon_days": history.horizon,
        "filters": history.filters,
        "chain": None if chain is None else {
            "intact": chain.chain_ok, "entries": chain.entries, "head": chain.head,
            "bad_line": chain.bad_line, "problem": chain.problem},
        "record_problems": history.record_problems,
        "notes": history.notes,
        "exit_code": history.exit_code,
        "groups": groups,
    }
