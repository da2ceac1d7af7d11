"""`gate diff OLD.json NEW.json`: what changed between two verdicts, and whether NEW is worse.

Works on verdict.json documents (not Verdict objects), so verdicts written by any earlier run
can be compared. Findings are matched by their stable identity (rule, subject, features,
segment; gate/judge/findings.py), never by message. A condition-index finding in NEW whose
involved features are a subset of an OLD one's, or whose index is no higher than that of an OLD
one sharing a feature, is the same near dependency, not a new one.

NEW is worse when one of these holds:
* its status is higher (pass < warn < fail);
* it has an unwaived fail or warn finding on a subject that had none in OLD (new, or no
  longer waived);
* a value judged in NEW (an unwaived fail or warn finding's VIF or |r|) grew past the
  materiality step.
NEW is better when it is not worse and its status is lower or it resolved a finding.
"""

from __future__ import annotations

import json
import math
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

from gate.errors import ExitCode, GateError
from gate.judge.findings import STATUS_RANK

#: A VIF counts as worsened when it grew by more than this fraction (1 %), and a pair's |r|
#: when it grew by more than this amount: smaller moves are sampling noise between two tables
#: (a project convention, no source).
VIF_MATERIAL_INCREASE = 0.01
R_MATERIAL_INCREASE = 0.01
#: Rules whose findings are judged values (fail or warn) rather than notes.
_ACTIVE_LEVELS = ("fail", "warn")

FindingKey = tuple[str, str, tuple[str, ...], str | None]


@dataclass(frozen=True)
class FindingChange:
    rule: str
    features: list[str]
    level: str
    waived: bool
    message: str
    subject: str = ""
    segment: str | None = None


@dataclass(frozen=True)
class Worsened:
    subject: str  # feature name, or "a ~ b" for a pair
    old: float | None  # None: infinite VIF, or (pairs) not listed in OLD: below its limit
    new: float | None
    note: str = ""


@dataclass(frozen=True)
class VerdictDiff:
    old_status: str
    new_status: str
    new_findings: list[FindingChange] = field(default_factory=list)
    resolved_findings: list[FindingChange] = field(default_factory=list)
    no_longer_waived: list[FindingChange] = field(default_factory=list)
    vif_worsened: list[Worsened] = field(default_factory=list)
    correlation_worsened: list[Worsened] = field(default_factory=list)
    features_added: list[str] = field(default_factory=list)
    features_removed: list[str] = field(default_factory=list)
    judged_values_grown: list[str] = field(default_factory=list)  # subjects in breach that grew

    @property
    def worse(self) -> bool:
        if STATUS_RANK[self.new_status] > STATUS_RANK[self.old_status]:
            return True
        if any(f.level in _ACTIVE_LEVELS and not f.waived
               for f in self.new_findings + self.no_longer_waived):
            return True
        return bool(self.judged_values_grown)

    @property
    def better(self) -> bool:
        return not self.worse and (
            STATUS_RANK[self.new_status] < STATUS_RANK[self.old_status]
            or any(f.level in _ACTIVE_LEVELS and not f.waived for f in self.resolved_findings))

    @property
    def exit_code(self) -> int:
        return int(ExitCode.FAILED if self.worse else ExitCode.OK)

    def to_dict(self) -> dict[str, Any]:
        return {"worse": self.worse, "better": self.better, **asdict(self)}

    def lines(self) -> list[str]:
        arrow = "unchanged" if self.old_status == self.new_status else "changed"
        verdict = "WORSE" if self.worse else "BETTER" if self.better else "not worse"
        out = [f"status: {self.old_status} -> {self.new_status} ({arrow}); NEW is {verdict}"]
        for title, items in (("new findings", self.new_findings),
                             ("no longer waived", self.no_longer_waived),
                             ("resolved findings", self.resolved_findings)):
            out.append(f"{title}: {len(items)}")
            out += [f"  [{'waived' if f.waived else f.level}] {f.rule}: {f.message}"
                    for f in items]
        for title, worsened in (("VIF worsened", self.vif_worsened),
                                ("|r| worsened", self.correlation_worsened)):
            out.append(f"{title}: {len(worsened)}")
            out += [f"  {w.subject}: {_text(w.old, w.note)} -> {_text(w.new)}"
                    for w in worsened]
        if self.judged_values_grown:
            out.append("values in breach that grew past the materiality step: "
                       + ", ".join(self.judged_values_grown))
        if self.features_added or self.features_removed:
            out.append(f"features added: {', '.join(self.features_added) or 'none'}; removed: "
                       f"{', '.join(self.features_removed) or 'none'}")
        return out


def load_verdict_document(path: str | Path) -> dict[str, Any]:
    """Read a verdict.json file, with a one-line error naming the file when it is unusable."""
    file = Path(path)
    try:
        document = json.loads(file.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise GateError(f"{file}: verdict file not found; pass the verdict.json that "
                        "`gate check` wrote") from None
    except (OSError, UnicodeDecodeError, ValueError) as exc:
        raise GateError(f"{file}: not a readable verdict.json ({exc}); pass the file "
                        "`gate check` wrote") from None
    if not isinstance(document, dict) or document.get("status") not in STATUS_RANK \
            or not isinstance(document.get("findings"), list):
        raise GateError(f"{file}: not a verdict.json (needs 'status' and 'findings'); pass the "
                        "file `gate check` wrote")
    return document


def diff_verdicts(old: dict[str, Any], new: dict[str, Any], *, old_name: str = "OLD",
                  new_name: str = "NEW") -> VerdictDiff:
    """Compare two verdict.json documents (a malformed one is a GateError naming it)."""
    old_findings = _findings(old, old_name)
    new_findings = _findings(new, new_name)
    added = [_change(f) for key, f in new_findings.items()
             if key not in old_findings and not _same_near_dependency(key, f, old_findings)]
    resolved = [_change(f) for key, f in old_findings.items()
                if key not in new_findings and not _same_near_dependency(key, f, new_findings)]
    unwaived = [_change(f) for key, f in new_findings.items()
                if key in old_findings and old_findings[key].get("waived")
                and not f.get("waived")]
    vif_worse = _guarded(lambda: _vif_worsened(old, new), old_name, new_name)
    pairs_worse = _guarded(lambda: _pairs_worsened(old, new), old_name, new_name)
    judged = {name for f in new_findings.values() if f.get("level") in _ACTIVE_LEVELS
              and not f.get("waived") for name in f.get("features", [])}
    grown = [w.subject for w in vif_worse if w.subject.split(" (GVIF")[0] in judged] + [
        w.subject for w in pairs_worse
        if w.old is not None and set(w.subject.split(" ~ ")) <= judged]
    old_features = [str(f) for f in old.get("features", [])]
    new_features = [str(f) for f in new.get("features", [])]
    return VerdictDiff(
        old_status=str(old["status"]), new_status=str(new["status"]),
        new_findings=added, resolved_findings=resolved, no_longer_waived=unwaived,
        vif_worsened=vif_worse, correlation_worsened=pairs_worse,
        features_added=[f for f in new_features if f not in set(old_features)],
        features_removed=[f for f in old_features if f not in set(new_features)],
        judged_values_grown=grown,
    )


def diff_files(old: str | Path, new: str | Path) -> VerdictDiff:
    return diff_verdicts(load_verdict_document(old), load_verdict_document(new),
                         old_name=str(old), new_name=str(new))


def _guarded(compute: Any, old_name: str, new_name: str) -> Any:
    try:
        return compute()
    except (TypeError, ValueError, KeyError, AttributeError) as exc:
        raise GateError(f"{old_name} or {new_name}: diagnostics hold a value that is not a "
                        f"number ({type(exc).__name__}: {str(exc)[:120]}); pass verdict.json "
                        "files that `gate check` wrote") from None


def finding_key(finding: dict[str, Any]) -> FindingKey:
    """The stable identity of a verdict.json finding: (rule, subject, sorted features,
    segment). `gate diff` and `gate history` match findings across runs by it."""
    features = finding.get("features")
    names = tuple(sorted(str(f) for f in features)) if isinstance(features, list) else ()
    segment = finding.get("segment")
    return (str(finding.get("rule")), _subject_of(finding), names,
            None if segment is None else str(segment))


def _subject_of(finding: dict[str, Any]) -> str:
    """The subject kind; verdicts written before it was recorded get it from the rule."""
    subject = finding.get("subject")
    if isinstance(subject, str):
        return subject
    rule, features = finding.get("rule"), finding.get("features") or []
    return {"pairwise_correlation": "pair", "condition_number": "condition_index",
            "rank_deficiency": "dependency" if features else "rows",
            "vif": "feature"}.get(str(rule), str(rule))


def _findings(document: dict[str, Any], name: str) -> dict[FindingKey, dict[str, Any]]:
    out: dict[FindingKey, dict[str, Any]] = {}
    for finding in document["findings"]:
        if not isinstance(finding, dict) or not isinstance(finding.get("features", []), list):
            raise GateError(f"{name}: a finding is not an object with a 'features' list; pass "
                            "the verdict.json that `gate check` wrote")
        key = finding_key(finding)
        if key in out:  # two findings with one identity (e.g. two diffuse indices)
            count = sum(1 for k in out if k[:3] == key[:3] and k[3] == key[3])
            key = (key[0], key[1], (*key[2], f"#{count + 1}"), key[3])
        out[key] = finding
    return out


def _same_near_dependency(key: FindingKey, finding: dict[str, Any],
                          others: dict[FindingKey, dict[str, Any]]) -> bool:
    """A condition-index finding matches one of ``others`` when its features are a subset of
    the other's, or when they share a feature (or either names none) and its index is no
    higher: the near dependency was reduced, not created."""
    if key[1] != "condition_index":
        return False
    mine = set(key[2])
    value = finding.get("value")
    for other_key, other in others.items():
        if other_key[1] != "condition_index" or other_key[3] != key[3]:
            continue
        theirs = set(other_key[2])
        if mine <= theirs:
            return True
        shared = bool(mine & theirs) or not mine or not theirs
        other_value = other.get("value")
        if shared and (value is None and other_value is None or (
                isinstance(value, (int, float)) and isinstance(other_value, (int, float))
                and value <= other_value)):
            return True
    return False


def _change(finding: dict[str, Any]) -> FindingChange:
    segment = finding.get("segment")
    return FindingChange(rule=str(finding.get("rule")),
                         features=[str(f) for f in finding.get("features", [])],
                         level=str(finding.get("level")), waived=bool(finding.get("waived")),
                         message=str(finding.get("message", "")), subject=_subject_of(finding),
                         segment=None if segment is None else str(segment))


def _vif_worsened(old: dict[str, Any], new: dict[str, Any]) -> list[Worsened]:
    old_vif = _vif_map(old)
    new_vif = _vif_map(new)
    out = [Worsened(name, _finite(old_vif[name]), _finite(value))
           for name, value in new_vif.items()
           if name in old_vif and _increased(old_vif[name], value)]
    return sorted(out, key=lambda w: (w.new is not None, -(_inf(w.new) - _inf(w.old))))


def _vif_map(document: dict[str, Any]) -> dict[str, float]:
    diagnostics = document.get("diagnostics", {})
    out = {str(k): _inf(v) for k, v in (diagnostics.get("vif") or {}).items()}
    for column, group in (diagnostics.get("gvif") or {}).items():
        gvif, df = group.get("gvif"), group.get("df") or 1
        out[f"{column} (GVIF^(1/df))"] = math.inf if gvif is None else float(gvif) ** (1 / df)
    return out


def _pairs_worsened(old: dict[str, Any], new: dict[str, Any]) -> list[Worsened]:
    old_pairs = _pair_map(old)
    out: list[Worsened] = []
    for key, r in _pair_map(new).items():
        before = old_pairs.get(key)
        if before is None or abs(r) > abs(before) + R_MATERIAL_INCREASE:
            out.append(Worsened(f"{key[0]} ~ {key[1]}",
                                None if before is None else abs(before), abs(r),
                                "newly at or above the limit" if before is None else ""))
    return sorted(out, key=lambda w: -(w.new or 0.0))


def _pair_map(document: dict[str, Any]) -> dict[tuple[str, str], float]:
    pairs = (document.get("diagnostics") or {}).get("pairs") or []
    out: dict[tuple[str, str], float] = {}
    for pair in pairs:
        a, b = sorted((str(pair["a"]), str(pair["b"])))
        out[(a, b)] = float(pair["r"])
    return out


def _increased(old: float, new: float) -> bool:
    if math.isinf(old):
        return False
    return math.isinf(new) or new > old * (1 + VIF_MATERIAL_INCREASE)


def _inf(value: Any) -> float:
    return math.inf if value is None else float(value)


def _finite(value: float) -> float | None:
    return None if math.isinf(value) else value


def _text(value: float | None, note: str = "") -> str:
    if value is None:
        return f"not listed ({note})" if note else "infinite"
    return f"{value:.4g}"
