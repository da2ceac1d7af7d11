"""`gate diff OLD.json NEW.json`: what changed between two verdicts, and whether NEW is worse.

Works on verdict.json documents (not Verdict objects), so verdicts written by any earlier run
can be compared. NEW is worse when its status rank is higher (pass < warn < fail) or when it
has an unwaived fail or warn finding that OLD did not have unwaived (new, or no longer waived).
VIF and |r| changes below a small materiality step (see the constants) are not listed.
"""

from __future__ import annotations

import json
import math
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

from gate.errors import GateError
from gate.judge.findings import STATUS_RANK

#: A VIF counts as worsened when it grew by more than this fraction (1 %), and a pair's |r|
#: when it grew by more than this amount: smaller moves are sampling noise between two tables
#: (a project convention, no source).
VIF_MATERIAL_INCREASE = 0.01
R_MATERIAL_INCREASE = 0.01

FindingKey = tuple[str, tuple[str, ...]]


@dataclass(frozen=True)
class FindingChange:
    rule: str
    features: list[str]
    level: str
    waived: bool
    message: str


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

    @property
    def worse(self) -> bool:
        if STATUS_RANK[self.new_status] > STATUS_RANK[self.old_status]:
            return True
        return any(f.level in ("fail", "warn") and not f.waived
                   for f in self.new_findings + self.no_longer_waived)

    @property
    def exit_code(self) -> int:
        return 1 if self.worse else 0

    def to_dict(self) -> dict[str, Any]:
        return {"worse": self.worse, **asdict(self)}

    def lines(self) -> list[str]:
        arrow = "unchanged" if self.old_status == self.new_status else "changed"
        verdict = "WORSE" if self.worse else "not worse"
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


def diff_verdicts(old: dict[str, Any], new: dict[str, Any]) -> VerdictDiff:
    """Compare two verdict.json documents."""
    old_findings = _findings(old)
    new_findings = _findings(new)
    added = [_change(f) for key, f in new_findings.items() if key not in old_findings]
    resolved = [_change(f) for key, f in old_findings.items() if key not in new_findings]
    unwaived = [_change(f) for key, f in new_findings.items()
                if key in old_findings and old_findings[key].get("waived")
                and not f.get("waived")]
    old_features = list(old.get("features", []))
    new_features = list(new.get("features", []))
    return VerdictDiff(
        old_status=str(old["status"]), new_status=str(new["status"]),
        new_findings=added, resolved_findings=resolved, no_longer_waived=unwaived,
        vif_worsened=_vif_worsened(old, new), correlation_worsened=_pairs_worsened(old, new),
        features_added=[f for f in new_features if f not in set(old_features)],
        features_removed=[f for f in old_features if f not in set(new_features)],
    )


def diff_files(old: str | Path, new: str | Path) -> VerdictDiff:
    return diff_verdicts(load_verdict_document(old), load_verdict_document(new))


def _findings(document: dict[str, Any]) -> dict[FindingKey, dict[str, Any]]:
    out: dict[FindingKey, dict[str, Any]] = {}
    for finding in document["findings"]:
        key = (str(finding.get("rule")), tuple(sorted(map(str, finding.get("features", [])))))
        if key in out:  # two findings on the same subject (e.g. two condition indices)
            key = (key[0], (*key[1], f"#{sum(1 for k in out if k[:2] == key[:2]) + 1}"))
        out[key] = finding
    return out


def _change(finding: dict[str, Any]) -> FindingChange:
    return FindingChange(rule=str(finding.get("rule")),
                         features=[str(f) for f in finding.get("features", [])],
                         level=str(finding.get("level")), waived=bool(finding.get("waived")),
                         message=str(finding.get("message", "")))


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
