"""Remedies: the smallest set of features to drop so every fail-level limit passes.

Works from a finished :class:`~gate.judge.verdict.Verdict` only: the correlation matrix (p x p) and the
means and scales in its diagnostics. No row is read again, whatever the number of candidate
sets tried, because every limit is a function of the correlation submatrix of the kept columns
(and, for the condition number, of their means and scales):

* VIF_j = [C_KK^-1]_jj, from the Cholesky factor of C_KK (numerics.md);
* GVIF_G = det(C_GG) det([C_KK^-1]_GG) (Fox & Monette 1992, JASA 87:178-183), judged as
  GVIF^(1/df);
* |r| from C itself;
* condition indices from the structured factor of [1, X_K] exactly as in ``gate.diagnose.diagnostics``
  (:func:`gate.diagnose.diagnostics.condition_indices`; Belsley, Kuh & Welsch 1980, ch. 3).

Units. A numeric feature is one unit; a categorical column (all its dummies) is one unit and
drops as a whole. ``--keep`` units are never dropped.

Order of work.

1. Exact dependencies first, one column per dependency: with N the matrix whose rows span the
   null space of the design (one row per reported dependency, standardised coefficients), the
   design without the columns D has full rank iff rank(N[:, D]) = rank(N). Units are added in
   drop-priority order while they raise that rank (a matroid greedy: it drops exactly one
   column per dependency and never a column whose removal does not help).
2. Candidates are the units flagged by a fail-level breach after step 1. Feasibility is
   monotone (dropping more never raises a VIF, a GVIF, a pairwise |r| or the condition number:
   Cauchy interlacing for the singular values), so
   * with <= ``exact_limit`` candidates an exact branch and bound finds a minimum-size set:
     iterative deepening on the size k; at each node a fail-level breach is chosen and the
     search branches on which unit hits it (a pair needs one of its two members; a VIF or
     condition breach needs the unit itself or one of the other droppable units); a subtree
     is cut when dropping *every* remaining candidate still fails (monotonicity), and units
     whose breach persists even then are forced; the lower bound adds a maximal set of
     disjoint breached pairs. Every minimum-size set is found and the tie-break picks one.
   * otherwise a greedy search drops the unit with the highest VIF (or GVIF^(1/df)) among
     those in a breach, applies forced drops, then puts back every drop that is not needed.
     The result is inclusion-minimal; its size is reported beside a proven lower bound on
     the optimum (forced units + disjoint breached pairs), so the gap is stated, not assumed.

Tie-break among sets of equal size.

* With a preference file (features from most to least important): the set whose most
  important dropped unit is the least important wins, then the next, and so on
  (lexicographic on preference positions); unlisted units count as least important.
* Then (and without a file): the lowest loss of explained variance, defined as the variance
  of the dropped standardised features that the kept features cannot reproduce linearly,
  ``loss(D) = trace(C_DD - C_DK C_KK^-1 C_KD)`` (the trace of the Schur complement; it equals
  sum 1/VIF_j for a single drop j, and 0 for a column that an exact dependency reproduces).
"""

from __future__ import annotations

import datetime as dt
import json
import math
import re
import time
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Literal

import numpy as np
import scipy.linalg as sla
import yaml

from gate.design.plan import Design
from gate.diagnose.diagnostics import Diagnostics
from gate.errors import DesignError, PolicyError
from gate.judge.verdict import Verdict
from gate.numerics.kernels import FloatArray, IntArray, condition_indices
from gate.policy.models import Policy, parse_policy, today_utc

Method = Literal["auto", "exact", "greedy"]
#: Drop priority of a unit: (preference key, design position); smaller = dropped sooner.
Priority = tuple[int, int]
#: Above this many candidate units the exact search gives way to the greedy one.
EXACT_LIMIT = 20
#: Nodes the exact search may visit before it stops and falls back to the greedy result.
MAX_NODES = 20_000
#: Minimum-size sets compared by the tie-break before the exact search stops enumerating
#: (branches are tried in tie-break order, so the first ones found are the likeliest winners).
MAX_TIES = 64
#: Relative singular-value tolerance when ranking the (clean, rounded) dependency coefficients.
NULL_SPACE_TOLERANCE = 1e-6
GLOB_SPECIAL = {"*": "[*]", "?": "[?]", "[": "[[]"}


# --- results -------------------------------------------------------------------------------

@dataclass(frozen=True)
class SuggestStep:
    """One drop, with the state of the design before and after it."""

    feature: str
    reason: str
    vif_before: float  # the dropped unit's own VIF (GVIF^(1/df) for a group); inf if exact
    max_vif_before: float  # over the kept units (inf while an exact dependency remains)
    max_vif_after: float
    condition_before: float | None  # None while rank deficient
    condition_after: float | None
    breaches_after: int  # fail-level breaches left (whole table and judged segments)


@dataclass(frozen=True)
class Suggestion:
    """What to drop, why, and how hard the search worked."""

    drops: tuple[str, ...]
    steps: tuple[SuggestStep, ...]
    kept: tuple[str, ...]  # final design features
    method: Literal["none", "exact", "greedy"]
    candidates: tuple[str, ...]
    nodes: int  # search-tree nodes (exact) or steps (greedy) visited
    seconds: float
    exhaustive: bool  # True when the size is proven minimal
    lower_bound: int  # proven lower bound on the number of drops
    solved: bool
    remaining: tuple[str, ...]  # breaches left when not solved
    loss: float
    notes: tuple[str, ...] = ()
    evaluations: int = 0  # candidate sets whose limits were evaluated (p x p or m x m work)

    def lines(self) -> list[str]:
        """Terminal report: one line per step, then the final feature list."""
        how = {"none": "nothing to search",
               "exact": f"exact branch and bound over {len(self.candidates)} candidate(s)",
               "greedy": f"greedy over {len(self.candidates)} candidate(s); optimum is at "
                         f"least {self.lower_bound}"}[self.method]
        head = ("no drop needed: every fail-level limit passes" if not self.drops and
                self.solved else f"drop {len(self.drops)} unit(s)")
        out = [(f"{head} ({how}; {self.nodes} node(s), {self.evaluations} evaluation(s), "
               f"{self.seconds:.3f} s)")]
        for number, step in enumerate(self.steps, 1):
            out.append(
                f"  {number}. drop {step.feature}: {step.reason}; max VIF "
                f"{_fmt(step.max_vif_before)} -> {_fmt(step.max_vif_after)}, condition "
                f"number {_fmt(step.condition_before)} -> {_fmt(step.condition_after)}; "
                f"{step.breaches_after} fail-level breach(es) left")
        if not self.solved:
            out.append("  not solved: " + "; ".join(self.remaining))
        for note in self.notes:
            out.append(f"  note: {note}")
        out.append(f"  features kept ({len(self.kept)}): {', '.join(self.kept)}")
        if self.drops:
            out.append(f"  loss of explained variance (trace of the Schur complement): "
                       f"{self.loss:.4g}")
        return out

    def to_dict(self) -> dict[str, object]:
        return {
            "drops": list(self.drops), "kept": list(self.kept), "method": self.method,
            "candidates": list(self.candidates), "nodes": self.nodes,
            "evaluations": self.evaluations,
            "seconds": self.seconds, "exhaustive": self.exhaustive,
            "lower_bound": self.lower_bound, "solved": self.solved,
            "remaining": list(self.remaining), "loss": self.loss, "notes": list(self.notes),
            "steps": [{"feature": s.feature, "reason": s.reason,
                       "vif_before": _json_number(s.vif_before),
                       "max_vif_before": _json_number(s.max_vif_before),
                       "max_vif_after": _json_number(s.max_vif_after),
                       "condition_before": _json_number(s.condition_before),
                       "condition_after": _json_number(s.condition_after),
                       "breaches_after": s.breaches_after} for s in self.steps],
        }


def _fmt(value: float | None) -> str:
    if value is None:
        return "n/a (rank deficient)"
    return "inf" if math.isinf(value) else f"{value:.3g}"


def _json_number(value: float | None) -> float | None:
    return value if value is not None and math.isfinite(value) else None


# --- one design (the whole table, or one segment) -------------------------------------------

@dataclass(frozen=True)
class _Breach:
    kind: Literal["vif", "pair", "condition", "singular"]
    units: tuple[str, ...]  # the unit in breach first (vif), both members (pair), or involved
    value: float
    label: str


@dataclass
class _State:
    feasible: bool
    breaches: list[_Breach]
    inflation: dict[str, float]  # unit -> VIF (GVIF^(1/df) for groups); inf if singular
    explainers: dict[str, list[str]] = field(default_factory=dict)


@dataclass(frozen=True)
class _Reduced:
    """Schur complement of the always-kept columns, over the candidate columns."""

    base: frozenset[str]
    candidates: frozenset[str]
    columns: IntArray
    block: FloatArray


class _Problem:
    """The limits of one design, evaluated on any subset of its units."""

    fast: _Reduced | None = None

    def __init__(self, label: str, diagnostics: Diagnostics, design: Design, policy: Policy,
                 today: dt.date) -> None:
        self.label = label
        self.d = diagnostics
        self.names = design.features
        limits = policy.limits
        self.unit_columns: dict[str, IntArray] = {}
        self.group_units: set[str] = set()
        grouped: dict[int, str] = {}
        for group in design.groups:
            self.unit_columns[group.column] = np.asarray(group.indices, dtype=np.intp)
            self.group_units.add(group.column)
            grouped.update({k: group.column for k in group.indices})
        for j, name in enumerate(self.names):
            if j not in grouped:
                self.unit_columns[name] = np.asarray([j], dtype=np.intp)
        self.column_unit = [grouped.get(j, name) for j, name in enumerate(self.names)]
        self.constant = ~np.isfinite(np.diag(diagnostics.correlation))
        self.vif_max = limits.vif.max if limits.vif.level == "fail" else None
        self.pair_max = limits.pairwise_correlation.max \
            if limits.pairwise_correlation.level == "fail" else None
        cond = limits.condition_number
        self.cond_max = cond.max if cond.level == "fail" else None
        self.scaling = cond.scaling
        self.proportion = cond.proportion
        active = [w for w in policy.waivers if w.expires >= today]
        self.vif_waived = {n for w in active if w.rule == "vif" for n in w.features}
        self.pair_waivers = [set(w.features) for w in active if w.rule == "pairwise_correlation"]
        self.cond_waivers = [set(w.features) for w in active if w.rule == "condition_number"]
        self.pairs: list[tuple[int, int, float]] = []
        if self.pair_max is not None:
            first, second, values = diagnostics.pairs(self.pair_max)
            for a, b, v in zip(first.tolist(), second.tolist(), values.tolist()):
                both = {self.names[a], self.names[b]}
                if not any(both <= w for w in self.pair_waivers):
                    self.pairs.append((a, b, v))

    # columns and factors

    def kept_columns(self, dropped: frozenset[str]) -> IntArray:
        keep = [j for j, unit in enumerate(self.column_unit)
                if unit not in dropped and not self.constant[j]]
        return np.asarray(keep, dtype=np.intp)

    def factor(self, kept: IntArray) -> FloatArray | None:
        """Upper Cholesky factor of C_KK, or None when it is not positive definite."""
        return self.factor_of(self.d.correlation[np.ix_(kept, kept)])

    def constant_kept(self, dropped: frozenset[str]) -> list[str]:
        return [self.column_unit[j] for j in np.flatnonzero(self.constant)
                if self.column_unit[j] not in dropped]

    # evaluation

    def prepare(self, base: frozenset[str], candidates: Iterable[str]) -> None:
        """Precompute the Schur complement of the columns every candidate set keeps.

        With F the kept non-candidate columns and S the kept candidate columns,
        [C_KK^-1]_SS = (C_SS - C_SF C_FF^-1 C_FS)^-1 (block inverse), so VIFs and GVIFs of the
        candidates -- the only units that can breach, since dropping never raises an
        inflation -- come from the m x m matrix Z = C_cc - Y'Y, Y = R_F^-T C_Fc, whatever p is.
        The condition number needs the whole factor, so it keeps the full route.
        """
        self.fast = None
        if self.cond_max is not None:
            return
        chosen = frozenset(candidates)
        kept = self.kept_columns(base)
        movable = np.asarray([c for c in kept if self.column_unit[c] in chosen], dtype=np.intp)
        fixed = np.asarray([c for c in kept if self.column_unit[c] not in chosen], dtype=np.intp)
        r_fixed = self.factor(fixed)
        if r_fixed is None:
            return
        block = self.d.correlation[np.ix_(movable, movable)]
        if fixed.size and movable.size:
            y = sla.solve_triangular(r_fixed, self.d.correlation[np.ix_(fixed, movable)],
                                     trans="T", check_finite=False)
            block = block - y.T @ y
        self.fast = _Reduced(base, chosen, movable, block)

    def evaluate(self, dropped: frozenset[str], *, full: bool = False) -> _State:
        """Fail-level breaches of the design without the ``dropped`` units.

        ``full`` also reports the inflation of every kept unit (for the step report); otherwise,
        after :meth:`prepare`, only candidates are evaluated (nothing else can breach).
        """
        constants = self.constant_kept(dropped)
        fast = self.fast
        if (not full and fast is not None and dropped >= fast.base
                and dropped - fast.base <= fast.candidates):
            keep_pos = np.asarray([k for k, c in enumerate(fast.columns)
                                   if self.column_unit[c] not in dropped], dtype=np.intp)
            kept = fast.columns[keep_pos]
            block = fast.block[np.ix_(keep_pos, keep_pos)]
            whole = False
        else:
            kept = self.kept_columns(dropped)
            block = self.d.correlation[np.ix_(kept, kept)]
            whole = True
        r = self.factor_of(block)
        if constants or r is None:
            units = tuple(dict.fromkeys(constants + [self.column_unit[j] for j in kept]))
            return _State(False, [_Breach("singular", units, math.inf,
                                          f"{self.label}rank deficient")],
                          dict.fromkeys(units, math.inf))
        breaches: list[_Breach] = []
        inflation: dict[str, float] = {}
        explainers: dict[str, list[str]] = {}
        if kept.size:
            inverse, info = sla.lapack.dtrtri(r, lower=0)
            if info != 0 or not np.all(np.isfinite(inverse)):
                units = tuple(dict.fromkeys(self.column_unit[j] for j in kept))
                return _State(False, [_Breach("singular", units, math.inf,
                                              f"{self.label}rank deficient")],
                              dict.fromkeys(units, math.inf))
            self._inflation(kept, inverse, inflation, breaches, explainers)
        for a, b, v in self.pairs:
            units = (self.column_unit[a], self.column_unit[b])
            if units[0] not in dropped and units[1] not in dropped:
                breaches.append(_Breach("pair", units, abs(v),
                                        f"{self.label}{self.names[a]} ~ {self.names[b]}: "
                                        f"|r| {abs(v):.3f} >= {self.pair_max:g}"))
        if self.cond_max is not None and whole and kept.size:
            breaches += self._condition_breaches(kept, r)
        return _State(not breaches, breaches, inflation, explainers)

    @staticmethod
    def factor_of(block: FloatArray) -> FloatArray | None:
        if block.size == 0:
            return np.zeros((0, 0))
        try:
            r = sla.cholesky(block, lower=False, check_finite=False)
        except (np.linalg.LinAlgError, ValueError):
            return None
        return np.asarray(r) if np.all(np.isfinite(r)) and np.all(np.diag(r) > 0) else None

    def _inflation(self, kept: IntArray, inverse: FloatArray, inflation: dict[str, float],
                   breaches: list[_Breach], explainers: dict[str, list[str]]) -> None:
        position = {int(c): k for k, c in enumerate(kept)}
        vif = np.einsum("ij,ij->i", inverse, inverse)
        for unit in dict.fromkeys(self.column_unit[j] for j in kept):
            cols = [position[int(c)] for c in self.unit_columns[unit]]
            if unit in self.group_units:
                p_gg = inverse[cols] @ inverse[cols].T
                _, log_c = np.linalg.slogdet(self.d.correlation[np.ix_(
                    self.unit_columns[unit], self.unit_columns[unit])])
                _, log_p = np.linalg.slogdet(p_gg)
                value = float(np.exp((log_c + log_p) / len(cols)))
            else:
                value = float(vif[cols[0]])
            inflation[unit] = value
            if self.vif_max is not None and value > self.vif_max and unit not in self.vif_waived:
                explainers[unit] = self._explainers(inverse, kept, cols)
                breaches.append(_Breach("vif", (unit,), value,
                                        f"{self.label}{unit}: VIF {value:.3g} > "
                                        f"{self.vif_max:g}"))

    def _explainers(self, inverse: FloatArray, kept: IntArray, cols: list[int]) -> list[str]:
        """Other units by their largest |b_jk| = |P_jk / P_jj| (auxiliary regression)."""
        rows = inverse[cols] @ inverse.T  # P restricted to the unit's rows
        weight = np.max(np.abs(rows) / np.abs(np.diag(rows[:, cols]))[:, None], axis=0)
        order = np.argsort(-weight, kind="stable")
        own = self.column_unit[int(kept[cols[0]])]
        return list(dict.fromkeys(self.column_unit[int(kept[k])] for k in order
                                  if self.column_unit[int(kept[k])] != own))

    def _condition_breaches(self, kept: IntArray, r: FloatArray) -> list[_Breach]:
        assert self.cond_max is not None
        d = self.d
        indices = condition_indices(d.weight_sum, d.means, kept, r, d.scales, self.scaling)
        if indices.size == 0 or not indices[-1] > self.cond_max:
            return []
        from gate.numerics.kernels import scaled_design_factor

        factor, columns = scaled_design_factor(d.weight_sum, d.means, kept, r, d.scales,
                                               self.scaling)
        _, mu, vt = sla.svd(factor, full_matrices=False, check_finite=False)
        phi = (vt.T / mu) ** 2
        proportions = (phi / phi.sum(axis=1, keepdims=True)).T
        out: list[_Breach] = []
        for k in range(mu.size - 1, -1, -1):
            index = float(mu[0] / mu[k])
            if not index > self.cond_max:
                break
            involved = sorted(((float(proportions[k, pos]), c) for pos, c in enumerate(columns)
                               if c >= 0), reverse=True)
            named = {self.names[c] for share, c in involved if share >= self.proportion}
            if named and any(named <= w for w in self.cond_waivers):
                continue
            units = tuple(dict.fromkeys(self.column_unit[c] for _, c in involved))
            out.append(_Breach("condition", units, index,
                               f"{self.label}condition index {index:.3g} > {self.cond_max:g}"))
        return out

    def condition_number(self, dropped: frozenset[str]) -> float | None:
        if self.constant_kept(dropped):
            return None
        kept = self.kept_columns(dropped)
        r = self.factor(kept)
        if r is None:
            return None
        d = self.d
        indices = condition_indices(d.weight_sum, d.means, kept, r, d.scales, self.scaling)
        return float(indices[-1]) if indices.size else 1.0

    def loss(self, dropped: frozenset[str]) -> float:
        """trace(C_DD - C_DK C_KK^-1 C_KD) over the dropped non-constant columns."""
        kept = self.kept_columns(dropped)
        gone = np.asarray([j for j, unit in enumerate(self.column_unit)
                           if unit in dropped and not self.constant[j]], dtype=np.intp)
        if gone.size == 0:
            return 0.0
        r = self.factor(kept)
        if r is None:
            return math.nan
        if kept.size == 0:
            return float(gone.size)
        y = sla.solve_triangular(r, self.d.correlation[np.ix_(kept, gone)], trans="T",
                                 check_finite=False)
        return float(max(0.0, gone.size - float(np.einsum("ij,ij->", y, y))))

    def reduced_loss(self, dropped: frozenset[str]) -> float:
        """The loss of the candidate drops given every kept column, from the prepared Schur
        block Z (nested Schur complements: trace(Z_DD - Z_DS Z_SS^-1 Z_SD)); the tie-break
        between candidate sets, which all share the dependency drops."""
        fast = self.fast
        if fast is None or not dropped >= fast.base or not dropped - fast.base <= fast.candidates:
            return self.loss(dropped)
        gone = np.asarray([k for k, c in enumerate(fast.columns)
                           if self.column_unit[c] in dropped], dtype=np.intp)
        kept = np.asarray([k for k, c in enumerate(fast.columns)
                           if self.column_unit[c] not in dropped], dtype=np.intp)
        if gone.size == 0:
            return 0.0
        z_dd = fast.block[np.ix_(gone, gone)]
        if kept.size == 0:
            return float(np.trace(z_dd))
        r = self.factor_of(fast.block[np.ix_(kept, kept)])
        if r is None:
            return math.nan
        y = sla.solve_triangular(r, fast.block[np.ix_(kept, gone)], trans="T",
                                 check_finite=False)
        return float(max(0.0, float(np.trace(z_dd)) - float(np.einsum("ij,ij->", y, y))))

    def null_basis(self) -> tuple[FloatArray, list[str]]:
        """Rows spanning the null space of the design (standardised coefficients)."""
        rows: list[FloatArray] = []
        labels: list[str] = []
        from gate.judge.rules import describe_dependency

        for dep in self.d.dependencies:
            row = np.zeros(len(self.names))
            for j, coef in dep.terms.items():
                row[j] = coef * (self.d.scales[j] if not self.constant[j] else 1.0)
            top = float(np.max(np.abs(row)))
            if top > 0:
                rows.append(row / top)
                labels.append(describe_dependency(dep, self.names))
        if not rows:
            return np.zeros((0, len(self.names))), []
        return np.vstack(rows), labels


def _rank(matrix: FloatArray) -> int:
    if matrix.size == 0:
        return 0
    singular = np.linalg.svd(matrix, compute_uv=False)
    return int(np.count_nonzero(singular > NULL_SPACE_TOLERANCE * max(1.0, float(singular[0]))))


# --- the search ----------------------------------------------------------------------------

class _BudgetSpent(Exception):
    pass


class _EnoughTies(Exception):
    pass


class _Search:
    def __init__(self, problems: list[_Problem], priority: dict[str, Priority],
                 max_nodes: int) -> None:
        self.problems = problems
        self.priority = priority  # unit -> preference key (smaller = drop sooner)
        self.max_nodes = max_nodes
        self.nodes = 0
        self.evaluations = 0
        self.ties_capped = False
        self.cache: dict[frozenset[str], tuple[bool, list[_Breach], dict[str, float],
                                               dict[str, list[str]]]] = {}

    def prepare(self, base: frozenset[str], candidates: list[str]) -> None:
        for problem in self.problems:
            problem.prepare(base, candidates)
        self.cache.clear()

    def state(self, dropped: frozenset[str]) -> _State:
        hit = self.cache.get(dropped)
        if hit is None:
            self.evaluations += 1
            feasible = True
            breaches: list[_Breach] = []
            inflation: dict[str, float] = {}
            explainers: dict[str, list[str]] = {}
            for problem in self.problems:
                st = problem.evaluate(dropped)
                feasible &= st.feasible
                breaches += st.breaches
                for unit, value in st.inflation.items():
                    inflation[unit] = max(value, inflation.get(unit, 0.0))
                for unit, ex in st.explainers.items():
                    explainers.setdefault(unit, ex)
            hit = (feasible, breaches, inflation, explainers)
            if len(self.cache) < 500_000:
                self.cache[dropped] = hit
        return _State(*hit)

    def count(self) -> None:
        self.nodes += 1
        if self.nodes > self.max_nodes:
            raise _BudgetSpent

    def supports(self, dropped: frozenset[str], state: _State, allowed: list[str]
                 ) -> list[list[str]] | None:
        """For each breach, a small set of units of which every feasible completion drops one.

        A set S is such a set exactly when keeping S (and dropping every other allowed unit)
        fails: by monotonicity, any completion that avoids S drops at most that much. S grows
        from the unit in breach along its strongest explainers until that holds. None: no
        completion is feasible at all.
        """
        allowed_set = frozenset(allowed)
        if not self.state(dropped | allowed_set).feasible:
            return None
        out: list[list[str]] = []
        seen: set[tuple[str, ...]] = set()
        for breach in state.breaches:
            if breach.kind == "vif":
                lead = breach.units[0]
                order = [lead, *state.explainers.get(lead, [])]
            else:
                order = list(breach.units)
            ordered = [u for u in dict.fromkeys(order) if u in allowed_set]
            ordered += [u for u in allowed if u not in ordered]
            kept: list[str] = []
            for unit in ordered:
                kept.append(unit)
                if not self.state(dropped | (allowed_set - frozenset(kept))).feasible:
                    break
            key = tuple(sorted(kept))
            if key not in seen:
                seen.add(key)
                out.append(kept)
        return out

    @staticmethod
    def disjoint(supports: list[list[str]]) -> int:
        """How many supports share no unit (a lower bound on the drops still needed)."""
        used: set[str] = set()
        count = 0
        for support in sorted(supports, key=len):
            if not used & set(support):
                used |= set(support)
                count += 1
        return count

    # exact

    def exact(self, base: frozenset[str], candidates: list[str], start: int
              ) -> list[frozenset[str]]:
        for size in range(start, len(candidates) + 1):
            found: list[frozenset[str]] = []
            try:
                self._dfs(base, frozenset(), frozenset(), size, candidates, found)
            except _EnoughTies:
                self.ties_capped = True
            if found:
                return found
        return []

    def _dfs(self, base: frozenset[str], chosen: frozenset[str], excluded: frozenset[str],
             size: int, candidates: list[str], found: list[frozenset[str]]) -> None:
        self.count()
        state = self.state(base | chosen)
        if state.feasible:
            if len(chosen) == size:
                found.append(chosen)
                if len(found) >= MAX_TIES:
                    raise _EnoughTies
            return
        if len(chosen) >= size:
            return
        allowed = [u for u in candidates if u not in chosen and u not in excluded]
        supports = self.supports(base | chosen, state, allowed)
        if supports is None:
            return
        forced = frozenset(s[0] for s in supports if len(s) == 1)
        if len(chosen) + max(len(forced), self.disjoint(supports)) > size:
            return
        if forced:
            self._dfs(base, chosen | forced, excluded, size, candidates, found)
            return
        narrowest: list[str] = min(supports, key=lambda support: len(support))
        branch = sorted(narrowest, key=lambda u: (
            self.priority[u][0], -state.inflation.get(u, 0.0), self.priority[u][1]))
        for i, unit in enumerate(branch):
            self._dfs(base, chosen | {unit}, excluded | frozenset(branch[:i]), size,
                      candidates, found)

    # greedy

    def greedy(self, base: frozenset[str], candidates: list[str]) -> list[str]:
        chosen: list[str] = []
        while True:
            self.count()
            state = self.state(base | frozenset(chosen))
            if state.feasible:
                break
            allowed = [u for u in candidates if u not in chosen]
            if not allowed:
                break
            supports = self.supports(base | frozenset(chosen), state, allowed) or []
            forced = sorted({s[0] for s in supports if len(s) == 1},
                            key=lambda u: self.priority[u])
            if forced:
                chosen += forced
                continue
            in_breach = {u for b in state.breaches for u in b.units} & set(allowed)
            pool = sorted(in_breach or set(allowed),
                          key=lambda u: (-state.inflation.get(u, 0.0), self.priority[u]))
            chosen.append(pool[0])
        for unit in reversed(list(chosen)):  # put back every drop that is not needed
            trial = [u for u in chosen if u != unit]
            self.count()
            if self.state(base | frozenset(trial)).feasible:
                chosen = trial
        return chosen

    def lower_bound(self, base: frozenset[str], candidates: list[str]) -> int:
        state = self.state(base)
        if state.feasible:
            return 0
        supports = self.supports(base, state, candidates) or []
        return max(1, self.disjoint(supports))  # the base design fails: at least one drop


# --- public entry point ----------------------------------------------------------------------

def suggest(verdict: Verdict, *, keep: Sequence[str] = (), prefer: Sequence[str] | None = None,
            method: Method = "auto", exact_limit: int = EXACT_LIMIT,
            max_nodes: int = MAX_NODES, today: dt.date | None = None) -> Suggestion:
    """The smallest set of units (features; categorical columns as a whole) to drop.

    Parameters
    ----------
    verdict : a finished check; its diagnostics (and those of its judged segments, if any)
        are all that is used.
    keep : units never to drop.
    prefer : units from most to least important (the tie-break); None = lowest loss of
        explained variance decides.
    method : "auto" (exact when there are <= ``exact_limit`` candidates), "exact", "greedy".
    max_nodes : budget of the exact search; when spent, the greedy result is returned and
        ``exhaustive`` is False.
    """
    started = time.perf_counter()
    today = today or today_utc()
    problems = [_Problem("", verdict.diagnostics, verdict.design, verdict.policy, today)]
    for segment in getattr(verdict, "segments", ()) or ():
        inner = getattr(segment, "verdict", None)
        if inner is not None and getattr(segment, "judged", True):
            problems.append(_Problem(f"[{segment.label}] ", inner.diagnostics, inner.design,
                                     verdict.policy, today))
    whole = problems[0]
    units = list(whole.unit_columns)
    _check_names(keep, units, whole, "--keep")
    _check_names(prefer or (), units, whole, "--prefer")
    keep_set = set(keep)
    ranking = {u: i for i, u in enumerate(prefer or ())}
    # smaller key = dropped sooner: unlisted first, then from the least important listed one
    priority = {u: (-(ranking.get(u, len(ranking))), units.index(u)) for u in units}
    search = _Search(problems, priority, max_nodes)
    notes: list[str] = []

    base, dependency_steps, unresolved = _resolve_dependencies(problems, keep_set, priority)
    dropped_by_dependency = list(base)
    base_f = frozenset(base)
    state = search.state(base_f)
    candidates = [u for u in units if u not in keep_set and u not in base_f
                  and any(u in b.units for b in state.breaches if b.kind != "singular")]
    if state.breaches and any(b.kind == "singular" for b in state.breaches) and not unresolved:
        candidates = [u for u in units if u not in keep_set and u not in base_f]
    chosen: list[str] = []
    exhaustive = True
    used: Literal["none", "exact", "greedy"] = "none"
    lower = 0
    if not state.feasible and candidates:
        everything = base_f | frozenset(candidates)
        if not search.state(everything).feasible:
            wider = [u for u in units if u not in keep_set and u not in base_f]
            if len(wider) > len(candidates):
                notes.append("dropping every flagged feature is not enough; the search "
                             "widened to all droppable features")
                candidates = wider
        search.prepare(base_f, candidates)
        lower = search.lower_bound(base_f, candidates)
        use_exact = method == "exact" or (method == "auto" and len(candidates) <= exact_limit)
        solutions: list[frozenset[str]] | None = None
        if use_exact:
            used = "exact"
            try:
                solutions = search.exact(base_f, candidates, lower)
            except _BudgetSpent:
                notes.append(f"exact search stopped after {max_nodes} nodes; the greedy "
                             "result is shown")
            if search.ties_capped:
                notes.append(f"the tie-break compared the first {MAX_TIES} minimum-size sets "
                             "found (tried in preference order, then highest VIF first)")
            if solutions:
                best = min(solutions, key=lambda s: _tie_key(s, base_f, priority, whole))
                chosen = _order_drops(search, base_f, list(best), priority)
                lower = len(chosen)
        if not solutions:  # greedy: by choice, budget spent, or no feasible set (best effort)
            if solutions is None:
                used = "greedy"
            search.max_nodes = search.nodes + 10 * max_nodes + 100
            chosen = _order_drops(search, base_f, search.greedy(base_f, candidates), priority)
            exhaustive = solutions is not None or len(chosen) <= lower
    final = base_f | frozenset(chosen)
    end_state = search.state(final)
    remaining = tuple(b.label for b in end_state.breaches) + tuple(unresolved)
    steps = _steps(search, dependency_steps, chosen, dropped_by_dependency)
    kept = tuple(name for j, name in enumerate(whole.names) if whole.column_unit[j] not in final)
    return Suggestion(
        drops=tuple(dropped_by_dependency + chosen), steps=tuple(steps), kept=kept,
        method=used, candidates=tuple(candidates), nodes=search.nodes,
        evaluations=search.evaluations,
        seconds=time.perf_counter() - started, exhaustive=exhaustive, lower_bound=lower,
        solved=end_state.feasible and not unresolved, remaining=remaining,
        loss=whole.loss(final), notes=tuple(notes))


def _check_names(names: Iterable[str], units: list[str], whole: _Problem, option: str) -> None:
    for name in names:
        if name in units:
            continue
        if name in whole.names:
            group = whole.column_unit[whole.names.index(name)]
            raise DesignError(f"{option}: '{name}' is a dummy of categorical column '{group}'; "
                              f"name the column '{group}' (categorical columns drop as a whole)")
        shown = ", ".join(units[:10]) + (", ..." if len(units) > 10 else "")
        raise DesignError(f"{option}: '{name}' is not a feature of the design; features are: "
                          f"{shown}")


def _tie_key(chosen: frozenset[str], base: frozenset[str], priority: dict[str, Priority],
             whole: _Problem) -> tuple[tuple[int, ...], float, tuple[str, ...]]:
    # Preference: compare the most important dropped unit first (larger position = less
    # important = better), i.e. minimise the sorted preference keys lexicographically.
    pref = tuple(sorted((priority[u][0] for u in chosen), reverse=True))
    loss = whole.reduced_loss(base | chosen)
    return pref, loss if math.isfinite(loss) else math.inf, tuple(sorted(chosen))


def _order_drops(search: _Search, base: frozenset[str], chosen: list[str],
                 priority: dict[str, Priority]) -> list[str]:
    """Report order: at each step the chosen unit with the highest current VIF."""
    left = list(chosen)
    order: list[str] = []
    dropped = base
    while left:
        inflation = search.state(dropped).inflation
        left.sort(key=lambda u: (-inflation.get(u, 0.0), priority[u]))
        unit = left.pop(0)
        order.append(unit)
        dropped = dropped | {unit}
    return order


def _resolve_dependencies(problems: list[_Problem], keep: set[str],
                          priority: dict[str, Priority]
                          ) -> tuple[list[str], dict[str, str], list[str]]:
    """One unit per exact dependency (matroid greedy on the null-space basis)."""
    dropped: list[str] = []
    reasons: dict[str, str] = {}
    unresolved: list[str] = []
    for problem in problems:
        basis, labels = problem.null_basis()
        if not labels:
            continue
        expressed = {problem.column_unit[dep.expressed] for dep in problem.d.dependencies}
        needed = _rank(basis)

        def columns_of(units: Iterable[str], problem: _Problem = problem) -> list[int]:
            return [int(c) for u in units if u in problem.unit_columns
                    for c in problem.unit_columns[u]]

        current = _rank(basis[:, columns_of(dropped)])
        involved = [u for u in problem.unit_columns
                    if np.any(basis[:, problem.unit_columns[u]] != 0.0)]
        order = sorted((u for u in involved if u not in keep and u not in dropped),
                       key=lambda u: (priority[u][0], u not in expressed, -priority[u][1]))
        for unit in order:
            if current >= needed:
                break
            gain = _rank(basis[:, columns_of(dropped + [unit])])
            if gain > current:
                rows = [k for k in range(len(labels))
                        if np.any(basis[k, problem.unit_columns[unit]] != 0.0)]
                reasons[unit] = f"{problem.label}{labels[rows[0]]}" if rows else \
                    "exact dependency"
                dropped.append(unit)
                current = gain
        if current < needed:
            kept_terms = sorted(u for u in involved if u in keep)
            unresolved.append(f"{problem.label}an exact dependency cannot be resolved without "
                              f"dropping a --keep feature ({', '.join(kept_terms)})")
    return dropped, reasons, unresolved


def _steps(search: _Search, reasons: dict[str, str], chosen: list[str],
           by_dependency: list[str]) -> list[SuggestStep]:
    whole = search.problems[0]
    steps: list[SuggestStep] = []
    dropped: frozenset[str] = frozenset()

    conditions: dict[frozenset[str], float | None] = {}

    def condition(drop: frozenset[str]) -> float | None:
        if drop not in conditions:
            conditions[drop] = whole.condition_number(drop)
        return conditions[drop]

    def full_state(drop: frozenset[str]) -> _State:
        states = [problem.evaluate(drop, full=True) for problem in search.problems]
        inflation: dict[str, float] = {}
        for st in states:
            for unit, value in st.inflation.items():
                inflation[unit] = max(value, inflation.get(unit, 0.0))
        return _State(all(st.feasible for st in states),
                      [b for st in states for b in st.breaches], inflation)

    before = full_state(dropped)
    for unit in by_dependency + chosen:
        after_set = dropped | {unit}
        after = full_state(after_set)
        if unit in reasons:
            relation = reasons[unit]  # as the verdict words it; avoid saying the kind twice
            reason = relation if relation.startswith("exact dependency") \
                else f"exact dependency ({relation})"
        else:
            own = before.inflation.get(unit, math.nan)
            kinds = sorted({b.kind for b in before.breaches if unit in b.units})
            reason = f"VIF {own:.3g}; in breach of {', '.join(kinds) or 'no limit'}"
        steps.append(SuggestStep(
            feature=unit, reason=reason, vif_before=before.inflation.get(unit, math.nan),
            max_vif_before=max(before.inflation.values(), default=1.0),
            max_vif_after=max(after.inflation.values(), default=1.0),
            condition_before=condition(dropped),
            condition_after=condition(after_set),
            breaches_after=len(after.breaches)))
        dropped, before = after_set, after
    return steps


# --- preference file and policy rewrite -------------------------------------------------------

def read_preference(path: str | Path) -> list[str]:
    """Feature names, most important first: one per line; '#' starts a comment."""
    file = Path(path)
    try:
        text = file.read_text(encoding="utf-8")
    except OSError as exc:
        raise PolicyError(f"{file}: cannot read the preference file ({exc.strerror or exc})") \
            from None
    names: list[str] = []
    for number, line in enumerate(text.splitlines(), 1):
        name = line.split("#", 1)[0].strip()
        if not name:
            continue
        if name in names:
            raise PolicyError(f"{file}: line {number}: '{name}' is listed twice; list each "
                              "feature once, most important first")
        names.append(name)
    return names


def escape_glob(name: str) -> str:
    """A glob that matches exactly ``name`` (columns.include/exclude are shell-style globs)."""
    return "".join(GLOB_SPECIAL.get(ch, ch) for ch in name)


def _yaml_item(value: str) -> str:
    return value if re.fullmatch(r"[A-Za-z_][A-Za-z0-9_.=-]*", value) else json.dumps(value)


def policy_with_exclusions(text: str, drops: Sequence[str], why: str) -> str:
    """The policy text with ``drops`` added to columns.exclude and a comment saying why.

    Edits the text in place where the YAML layout allows (block or flow lists, a missing
    exclude or columns key), so the original comments survive; otherwise the policy is
    re-serialised with a header comment. The result is validated before it is returned.
    """
    items = [escape_glob(d) for d in drops]
    comment = f"# {why}"
    for edit in (_edit_in_place, _rewrite):
        candidate = edit(text, items, comment)
        if candidate is None:
            continue
        try:
            policy = parse_policy(candidate, source="<rewritten policy>")
        except PolicyError:
            continue
        if set(items) <= set(policy.columns.exclude):
            return candidate
    raise PolicyError("cannot add the drops to columns.exclude of this policy; add them by "
                      f"hand: {', '.join(items)}")


def _edit_in_place(text: str, items: list[str], comment: str) -> str | None:
    try:
        root = yaml.compose(text, Loader=yaml.SafeLoader)
    except yaml.YAMLError:
        return None
    if not isinstance(root, yaml.MappingNode):
        return None
    lines = text.splitlines(keepends=True)
    if lines and not lines[-1].endswith("\n"):
        lines[-1] += "\n"
    columns = next(((k, v) for k, v in root.value if k.value == "columns"), None)
    if columns is None:
        body = "".join(lines)
        return body + f"{comment}\ncolumns:\n  exclude: [{', '.join(map(_yaml_item, items))}]\n"
    _, node = columns
    if not isinstance(node, yaml.MappingNode) or node.flow_style:
        return None
    exclude = next(((k, v) for k, v in node.value if k.value == "exclude"), None)
    if exclude is None:
        if not node.value:
            return None
        indent = " " * node.value[0][0].start_mark.column
        line = node.value[0][0].start_mark.line
        new = [f"{indent}{comment}\n",
               f"{indent}exclude: [{', '.join(map(_yaml_item, items))}]\n"]
        return "".join(lines[:line] + new + lines[line:])
    ex_key, seq = exclude
    indent = " " * ex_key.start_mark.column
    if isinstance(seq, yaml.SequenceNode) and seq.flow_style:
        old = [text[v.start_mark.index:v.end_mark.index] for v in seq.value]
        flow = "[" + ", ".join(old + [_yaml_item(i) for i in items]) + "]"
        body = text[:seq.start_mark.index] + flow + text[seq.end_mark.index:]
        out = body.splitlines(keepends=True)
        at = ex_key.start_mark.line
        return "".join(out[:at] + [f"{indent}{comment}\n"] + out[at:])
    if isinstance(seq, yaml.SequenceNode) and seq.value:
        first = seq.value[0]
        first_line = lines[first.start_mark.line]
        dash = first_line.rfind("-", 0, first.start_mark.column)
        if dash < 0:
            return None
        last = seq.value[-1]
        end_line = last.end_mark.line if last.end_mark.column > 0 else last.end_mark.line - 1
        pad = " " * dash
        new = [f"{pad}{comment}\n"] + [f"{pad}- {_yaml_item(i)}\n" for i in items]
        return "".join(lines[:end_line + 1] + new + lines[end_line + 1:])
    if isinstance(seq, yaml.ScalarNode) and seq.value in ("", "null", "~"):
        flow = "[" + ", ".join(_yaml_item(i) for i in items) + "]"
        line = ex_key.start_mark.line
        new = [f"{indent}{comment}\n", f"{indent}exclude: {flow}\n"]
        return "".join(lines[:line] + new + lines[line + 1:])
    return None


def _rewrite(text: str, items: list[str], comment: str) -> str | None:
    try:
        data = yaml.safe_load(text)
    except yaml.YAMLError:
        return None
    if not isinstance(data, dict):
        return None
    columns = data.setdefault("columns", {}) or {}
    data["columns"] = columns
    exclude = list(columns.get("exclude") or [])
    columns["exclude"] = exclude + [i for i in items if i not in exclude]
    header = f"{comment}\n# (re-serialised: the original file's comments were not kept)\n"
    return header + str(yaml.safe_dump(data, sort_keys=False, default_flow_style=False))


def suggestion_comment(suggestion: Suggestion, policy: Policy, today: dt.date | None = None
                       ) -> str:
    """The comment written above the added exclusions."""
    limits = policy.limits
    failing = [f"{name} > {getattr(limit, 'max', '')}".rstrip(" >") for name, limit in (
        ("vif", limits.vif), ("pairwise_correlation", limits.pairwise_correlation),
        ("condition_number", limits.condition_number),
        ("rank_deficiency", limits.rank_deficiency)) if limit.level == "fail"]
    when = (today or today_utc()).isoformat()
    return (f"gate suggest {when}: excluded {', '.join(suggestion.drops)} so every fail-level "
            f"limit passes ({'; '.join(failing)})")
