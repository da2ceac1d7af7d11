"""The Python API: the one place that knows the order of the stages.

read table -> design -> statistics (main pass, exact pass when needed) -> diagnostics -> judge
-> verdict. Artefact writers take the verdict and never recompute.
"""

from __future__ import annotations

import datetime as dt
import threading
from collections.abc import Callable
from dataclasses import replace
from pathlib import Path
from typing import Any, Literal

import numpy as np

from gate.design.plan import Design, DesignPlan, RowCounts, finish_design, plan_design
from gate.diagnose.diagnostics import Diagnostics, compute_diagnostics
from gate.errors import DesignError, TableError
from gate.judge.findings import Finding, status_of
from gate.judge.rules import judge
from gate.judge.verdict import TableInfo, Verdict, tool_version
from gate.numerics.kernels import TOP_ROWS_MIN_ORDER
from gate.policy.models import Policy, load_policy, today_utc
from gate.preload import preload_modules
from gate.read.sources import DaskFrameSource, TableSource, open_table
from gate.stats.accumulators import CentredGram
from gate.stats.local import Engine, LocalEngine, ProgressFactory
from gate.stats.routing import plan_exact_pass


def check(table: Any, policy: Policy | str | Path | None = None, *, label: str | None = None,
          today: dt.date | None = None, chunk_rows: int | None = None,
          engine: Literal["local", "dask"] | None = None, scheduler: Any = None,
          progress: ProgressFactory | None = None, csv_delimiter: str | None = None) -> Verdict:
    """Check a feature table against a policy.

    Parameters
    ----------
    table : path (Parquet file or folder, CSV, Feather/Arrow), pandas DataFrame, pyarrow Table
        or dask DataFrame
    policy : a :class:`Policy`, a path to a policy YAML file, or None for the packaged default
    label : free text carried into the verdict (e.g. a pipeline run id)
    today : the date waivers are judged against (default: today, UTC)
    chunk_rows : rows per chunk of the streaming passes (default: sized from the width)
    engine : "local" (this process) or "dask" (partition statistics on a Dask cluster, merged
        in a tree); default: "dask" for a dask DataFrame, else "local"
    scheduler : with the Dask engine, a scheduler address or a ``distributed.Client``
        (default: the current client, else a local cluster of 2 workers)
    progress : builds a row counter per pass (the CLI's progress line); None for silence
    csv_delimiter : a CSV file's field delimiter, one character or "tab" (default: ",")
    """
    policy = policy if isinstance(policy, Policy) else load_policy(policy)
    source = open_table(table, csv_delimiter=csv_delimiter, categorical=policy.columns.categorical)
    if policy.segments is not None:
        return _check_segments(source, policy, label=label, today=today, chunk_rows=chunk_rows,
                               progress=progress)
    digest = _hash_in_background(source)
    with _engine(source, engine, scheduler) as runner:
        plan = plan_design(source, policy, distinct=runner.distinct_values)
        if len(plan.layout) + 1 >= TOP_ROWS_MIN_ORDER:  # the scaled factor's order, at most
            # The top-rows route of the condition diagnostics needs scipy.linalg (0.25 s to
            # import): loaded beside the main pass instead of after it.
            preload_modules("scipy.linalg", thread_name="gate-preload-scipy")
        full_gram, counts = runner.main_pass(source, plan, chunk_rows=chunk_rows,
                                             progress=progress)
        verdict = _verdict_from_gram(runner, source, plan, full_gram, counts, policy,
                                     sha256=digest, label=label, today=today,
                                     chunk_rows=chunk_rows, progress=progress)
    return _with_structural(verdict, source, plan)


def _with_structural(verdict: Verdict, source: TableSource, plan: DesignPlan) -> Verdict:
    """Stage after judging: squares/products among breaching features, identifier-like
    features (information only)."""
    if isinstance(source, DaskFrameSource):
        return verdict  # a sample read would start the cluster's graph again; not worth it
    from gate.diagnose.identifiers import identifier_like

    found = identifier_like(source, verdict.design, verdict.diagnostics)
    verdict = replace(verdict, findings=verdict.findings + tuple(
        Finding("identifier", "info", (verdict.features[i.feature],), None, None,
                i.describe(verdict.features, verdict.diagnostics.rows), subject="feature",
                value_kind="undefined") for i in found))
    from gate.diagnose.structural import structural_terms

    terms = structural_terms(source, plan, verdict.design, verdict.diagnostics, verdict.policy)
    if not terms:
        return verdict
    names = verdict.design.features
    notes = tuple(Finding("structural", "info", (names[t.feature],
                                                 *(names[k] for k in dict.fromkeys(t.parents))),
                          t.correlation, None, t.describe(names), subject="structural")
                  for t in terms)
    return replace(verdict, structural=terms, findings=verdict.findings + notes)


def _check_segments(source: TableSource, policy: Policy, *, label: str | None,
                    today: dt.date | None, chunk_rows: int | None,
                    progress: ProgressFactory | None) -> Verdict:
    """The whole gate per segment and on the whole table, from ONE main pass: each segment's
    CentredGram is accumulated separately and the whole table's Gram is their merge."""
    from gate.judge.verdict import SegmentVerdict
    from gate.stats.segments import SegmentSource, segment_pass, segment_policy

    spec = policy.segments
    assert spec is not None
    if isinstance(source, DaskFrameSource):
        raise TableError(f"{source.name}: policy segments run on the local engine; pass a file, "
                         "a pandas DataFrame or a pyarrow Table")
    digest = _hash_in_background(source)
    runner = LocalEngine()
    distinct = None
    if getattr(source, "push_down", False):  # a database computes the sums (gate.sql)
        from gate.stats.pushdown import PushDownEngine
        from gate.stats.pushdown import segment_pass as pushed_segment_pass

        distinct = PushDownEngine(source).distinct_values  # type: ignore[arg-type]
    plan = plan_design(source, segment_policy(policy), distinct=distinct)
    if getattr(source, "push_down", False):
        result = pushed_segment_pass(source, plan, spec.by, chunk_rows=chunk_rows)
    else:
        result = segment_pass(source, plan, spec.by, chunk_rows=chunk_rows, progress=progress)
    sha256 = digest()

    def stages(part: TableSource, full_gram: CentredGram, counts: RowCounts) -> Verdict:
        return _verdict_from_gram(runner, part, plan, full_gram, counts, policy,
                                  sha256=lambda: sha256, label=label, today=today,
                                  chunk_rows=chunk_rows, progress=progress)

    whole = _with_structural(stages(source, result.gram, result.counts), source, plan)
    verdicts: list[SegmentVerdict] = []
    for segment in result.segments:
        rows, used = segment.counts.read, segment.gram.rows
        if used < spec.min_rows or segment.gram.weight_sum <= 0.0:
            reason = (f"{used} used rows < segments.min_rows {spec.min_rows}"
                      if used < spec.min_rows else "row weights sum to zero")
            verdicts.append(SegmentVerdict(result.by, segment.key, rows, used, None, reason))
        else:
            part = SegmentSource(source, result.by, segment.key)
            verdicts.append(SegmentVerdict(result.by, segment.key, rows, used,
                                           stages(part, segment.gram, segment.counts)))
    return whole.with_segments(tuple(verdicts))


def _verdict_from_gram(runner: Engine, source: TableSource, plan: DesignPlan,
                       full_gram: CentredGram, counts: RowCounts, policy: Policy, *,
                       sha256: Callable[[], str | None], label: str | None,
                       today: dt.date | None, chunk_rows: int | None,
                       progress: ProgressFactory | None) -> Verdict:
    """Main-pass statistics -> design -> (exact pass if needed) -> diagnostics -> verdict."""
    design = finish_design(plan, full_gram.mean, full_gram.rows, counts)
    gram = full_gram.select(np.asarray(design.selection, dtype=np.intp))
    _check_rows(design, gram.rows, gram.weight_sum, source.name)
    exact = plan_exact_pass(gram, tolerance=policy.limits.rank_deficiency.tolerance)
    factor = runner.exact_pass(source, plan, design.selection, exact, chunk_rows=chunk_rows,
                               progress=progress) if exact.needs_exact_pass else None
    diagnostics = compute_diagnostics(
        gram, exact, factor=factor, groups=tuple(g.indices for g in design.groups),
        scaling=policy.limits.condition_number.scaling,
        proportions_above=policy.limits.condition_number.max)
    database = _database_provenance(source)
    if factor is not None and database is not None and database["statistics"] == "push-down":
        note = ("exact pass: the database's sums could not settle the rank, so the rows were "
                "streamed from the database for it")
        design = replace(design, notes=design.notes + (note,))
    return build_verdict(diagnostics, design, policy, source_name=source.name,
                         sha256=sha256(), label=label, today=today, database=database)


def _database_provenance(source: TableSource) -> dict[str, Any] | None:
    """URL (password masked), query, its sha256, reported rows -- for a gate.sql source."""
    base = getattr(source, "base", source)  # a segment of a database source
    provenance = getattr(base, "provenance", None)
    return provenance() if callable(provenance) else None


def _engine(source: TableSource, engine: str | None, scheduler: Any) -> Engine:
    if engine is None:
        engine = "dask" if isinstance(source, DaskFrameSource) else "local"
    if engine == "local" and getattr(source, "push_down", False):  # gate.sql(push_down=True)
        from gate.stats.pushdown import PushDownEngine

        return PushDownEngine(source)  # type: ignore[arg-type]
    if engine == "dask":
        from gate.stats.dask import DaskEngine  # dask is optional: imported only here

        return DaskEngine(scheduler)
    if engine != "local":
        raise ValueError(f"engine must be 'local' or 'dask', not {engine!r}")
    if isinstance(source, DaskFrameSource):
        raise TableError(f"{source.name}: a dask DataFrame needs engine='dask'")
    return LocalEngine()


def _hash_in_background(source: TableSource) -> Callable[[], str | None]:
    """Start sha256 of the table's bytes on a thread (hashlib releases the GIL, so it runs
    beside the main pass); the returned function waits for it."""
    result: list[str | None] = []
    failure: list[BaseException] = []

    def run() -> None:
        try:
            result.append(source.sha256())
        except BaseException as exc:  # noqa: BLE001 - re-raised in the caller's thread
            failure.append(exc)

    # A daemon thread: an early error elsewhere is reported without waiting for the hash.
    worker = threading.Thread(target=run, name="gate-sha256", daemon=True)
    worker.start()

    def wait() -> str | None:
        worker.join()
        if failure:
            raise failure[0]
        return result[0]

    return wait


def build_verdict(diagnostics: Diagnostics, design: Design, policy: Policy, *,
                  source_name: str, sha256: str | None, label: str | None = None,
                  today: dt.date | None = None, database: dict[str, Any] | None = None
                  ) -> Verdict:
    findings, waivers = judge(diagnostics, design, policy, today or today_utc())
    counts = design.counts
    return Verdict(
        status=status_of(findings), findings=findings, waivers=waivers,
        table=TableInfo(source_name, sha256, counts.read, counts.used, counts.dropped,
                        dict(counts.missing), database),
        policy=policy, design=design, diagnostics=diagnostics, label=label,
        created_at=dt.datetime.now(dt.UTC).isoformat(timespec="seconds"),
        tool_version=tool_version(),
    )


def _check_rows(design: Design, rows: int, weight_sum: float, name: str) -> None:
    counts = design.counts
    if weight_sum <= 0.0 and counts.used > 0:
        raise DesignError(f"{name}: weight column '{design.weight}' sums to zero over the used "
                          "rows; give some rows a positive weight")
    if rows < 2 and design.weight is not None and rows < counts.used:
        raise DesignError(f"{name}: only {rows} row{'s' if rows != 1 else ''} of "
                          f"{counts.used} used rows {'has' if rows == 1 else 'have'} a positive "
                          f"weight in column '{design.weight}'; at least 2 are needed")
    if rows < 2:
        worst = max(counts.missing.items(), key=lambda kv: kv[1], default=None)
        why = f"; column '{worst[0]}' has {worst[1]} missing" if worst else ""
        raise DesignError(f"{name}: {rows} usable row{'s' if rows != 1 else ''} after dropping "
                          f"missing values (of {counts.read}); at least 2 are needed{why}")
