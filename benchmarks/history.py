"""Benchmark of `gate history`: N runs of P features, rendered from an audit log and its store.

    PYTHONPATH=. python benchmarks/history.py [--runs 10000] [--features 100] [--keep DIR]
                                              [--no-summaries] [--repeat 3]

One real verdict of a P-feature invented table (fleet-maintenance sensors, seeded) is checked
once; N variants of it (time, label, VIFs drifting, findings coming and going, a policy change
and a waiver) are recorded in an audit log with their stored verdicts and run summaries, the
way `gate check --audit-log` records them (``--no-summaries``: as a log written before
summaries existed, so every verdict is parsed whole). Then `gate history LOG --out DIR` runs as
a user runs it: a fresh process each time (interpreter start, imports, reading, charts, writing
history.html and history.json all included; the files are in the OS page cache, as right after
the runs that wrote them). Reported per run: wall time, CPU time (user + system) and peak RSS
of that process, from ``os.wait4``; the fastest of ``--repeat`` runs is the figure (the least
disturbed by other load on the machine; the load average is printed beside it). The target
(issue 14): at most 10 s for 10,000 runs of 100 features, with memory bounded by the number of
runs, not by the bytes of the verdicts.
"""

from __future__ import annotations

import argparse
import copy
import datetime as dt
import hashlib
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from gate.api import check
from gate.artefacts.audit import (
    FORMAT,
    GENESIS,
    canonical,
    entry_hash,
    store_path,
    summarise,
    summary_path,
    verify_chain,
)
from gate.artefacts.verdict_json import verdict_json


def fleet_frame(rows: int, features: int, seed: int = 7) -> pd.DataFrame:
    """Invented fleet-maintenance sensor table: a few latent wear factors, so VIFs vary."""
    rng = np.random.default_rng(seed)
    latent = rng.normal(size=(rows, 6))
    mix = rng.normal(size=(6, features)) * (rng.uniform(size=features) < 0.3)
    data = latent @ mix + rng.normal(size=(rows, features))
    return pd.DataFrame(data, columns=[f"sensor_{k:03d}" for k in range(features)])


def write_record(folder: Path, runs: int, features: int, *, summaries: bool = True) -> Path:
    base = json.loads(verdict_json(check(fleet_frame(2_000, features), label="bench")))
    rng = np.random.default_rng(11)
    log = folder / "audit.jsonl"
    store = folder / "verdicts"
    store.mkdir(parents=True, exist_ok=True)
    start = dt.datetime(2025, 1, 1, tzinfo=dt.UTC)
    prev = GENESIS
    base["waivers"] = [{"rule": "vif", "features": ["sensor_001"], "owner": "fleet-analytics",
                        "reason": "kept for the wear model", "expires": "2026-12-20",
                        "state": "active", "covered": 1}]
    names = list(base["diagnostics"]["vif"])
    vif0 = np.array([v if v is not None else 50.0 for v in base["diagnostics"]["vif"].values()])
    with open(log, "wb") as handle:
        for k in range(runs):
            doc = copy.copy(base)
            moment = start + dt.timedelta(hours=2 * k)
            doc["created_at"] = moment.isoformat(timespec="seconds")
            doc["label"] = f"nightly-{k}"
            vif = vif0 * np.exp(rng.normal(0.0, 0.15, vif0.size))
            doc["diagnostics"] = dict(base["diagnostics"], vif=dict(zip(names, vif.tolist())))
            findings = [{"rule": "vif", "level": "fail", "features": [n], "value": float(v),
                         "limit": 5.0, "waived": False, "waiver": None,
                         "message": f"{n}: VIF {v:.3g} > 5"}
                        for n, v in zip(names, vif.tolist()) if v > 5.0]
            doc["findings"] = findings
            doc["status"] = "fail" if findings else "pass"
            if k >= runs // 2:  # a policy change half way
                doc["policy"] = dict(base["policy"], sha256="e" * 64)
            data = json.dumps(doc, indent=2, allow_nan=False).encode() + b"\n"
            sha = hashlib.sha256(data).hexdigest()
            store_path(log, sha).write_bytes(data)
            kept: dict[str, Any] = {"sha256": sha}
            if summaries:  # as audit.keep_verdict does it, without an fsync per file
                summary = summarise(json.loads(data), sha)
                summary_path(log, sha).write_bytes(summary)
                kept["summary_sha256"] = hashlib.sha256(summary).hexdigest()
            entry = {"created_at": doc["created_at"], "format": FORMAT, "label": doc["label"],
                     "policy": {"name": doc["policy"]["name"],
                                "sha256": doc["policy"]["sha256"]},
                     "prev": prev, "seq": k + 1, "status": doc["status"],
                     "table": {"sha256": doc["table"]["sha256"],
                               "source": doc["table"]["source"]},
                     "tool": {"version": doc["tool"]["version"]}, "verdict": kept}
            entry["hash"] = entry_hash(entry)
            prev = entry["hash"]
            handle.write(canonical(entry) + b"\n")
    return log


def time_history(log: Path, out: Path) -> dict[str, Any]:
    """One `gate history LOG --out DIR` in a fresh process: wall, CPU and peak RSS.

    Peak RSS from GNU time (``/usr/bin/time -f %M``) when present, as in benchmarks/run.py: a
    child forked from the benchmark process starts from the parent's RSS high-water mark in
    ``ru_maxrss`` (after the 10,000-feature table was generated, 1.6 GB for a 0.2 GB run)."""
    env = dict(os.environ, PYTHONPATH=str(Path(__file__).resolve().parents[1]))
    command = [sys.executable, "-m", "gate", "history", str(log), "--out", str(out),
               "--horizon", "30"]
    timer = Path("/usr/bin/time")
    with tempfile.NamedTemporaryFile(prefix="gate-bench-rss-", suffix=".txt") as rss_file:
        prefix = [str(timer), "-f", "%M", "-o", rss_file.name] if timer.exists() else []
        t0 = time.perf_counter()
        process = subprocess.Popen([*prefix, *command], env=env, stdout=subprocess.DEVNULL,
                                   stderr=subprocess.PIPE)
        assert process.stderr is not None
        err = process.stderr.read()
        _, status, usage = os.wait4(process.pid, 0)
        wall = time.perf_counter() - t0
        peak_kb = float(usage.ru_maxrss)
        if prefix:
            text = Path(rss_file.name).read_text().split()
            peak_kb = float(text[-1]) if text and text[-1].isdigit() else peak_kb
    process.returncode = os.waitstatus_to_exitcode(status)
    return {"seconds": wall, "cpu_seconds": usage.ru_utime + usage.ru_stime,
            "peak_rss_mb": peak_kb / 1024, "returncode": process.returncode,
            "stderr": err.decode(errors="replace").strip()}


def bench_history(folder: Path, runs: int = 10_000, features: int = 100, repeat: int = 3,
                  *, summaries: bool = True) -> dict[str, Any]:
    """Write (or reuse) the record in ``folder`` and time `gate history` on it ``repeat``
    times; the figures of the fastest run, and every run's."""
    folder.mkdir(parents=True, exist_ok=True)
    log = folder / "audit.jsonl"
    t0 = time.perf_counter()
    if not log.exists():
        write_record(folder, runs, features, summaries=summaries)
    made = time.perf_counter() - t0
    size = sum(p.stat().st_size for p in (folder / "verdicts").iterdir() if p.suffix == ".json")
    report = verify_chain(log)
    assert report.ok, report.describe()
    tries = [time_history(log, folder / "out") for _ in range(repeat)]
    best = min(tries, key=lambda t: t["seconds"])
    html = (folder / "out" / "history.html").stat().st_size / 1e6
    return {"runs": runs, "features": features, "summaries": summaries,
            "verdicts_mb": size / 1e6, "record_seconds": made, "html_mb": html,
            "seconds": best["seconds"], "cpu_seconds": best["cpu_seconds"],
            "peak_rss_mb": max(t["peak_rss_mb"] for t in tries),
            "returncode": best["returncode"], "stderr": best["stderr"], "target_seconds": 10.0,
            "tries": [{k: v for k, v in t.items() if k != "stderr"} for t in tries],
            "load_average": list(os.getloadavg())}


def describe(x: dict[str, Any]) -> str:
    """One line for a bench_history result."""
    ok = x["returncode"] == 0 and x["seconds"] <= x["target_seconds"]
    form = "with run summaries" if x["summaries"] else "without summaries (verdicts parsed whole)"
    return (f"gate history, {x['runs']:,} runs x {x['features']} features "
            f"({x['verdicts_mb']:.0f} MB of stored verdicts, {form}): exit {x['returncode']}, "
            f"{x['seconds']:.2f} s wall, {x['cpu_seconds']:.2f} s CPU (whole process, fastest "
            f"of {len(x['tries'])}), peak RSS {x['peak_rss_mb']:.0f} MB, history.html "
            f"{x['html_mb']:.1f} MB (target <= {x['target_seconds']:.0f} s: "
            f"{'meets target' if ok else 'MISSES target'}); load average "
            f"{', '.join(f'{v:.1f}' for v in x['load_average'])}")


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--runs", type=int, default=10_000)
    parser.add_argument("--features", type=int, default=100)
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--no-summaries", action="store_true",
                        help="record as a log written before run summaries existed")
    parser.add_argument("--keep", type=Path,
                        help="write the record and output here (a record already there is reused)")
    args = parser.parse_args()
    folder = args.keep or Path(tempfile.mkdtemp(prefix="gate-history-bench-"))
    result = bench_history(folder, args.runs, args.features, args.repeat,
                           summaries=not args.no_summaries)
    print(f"record: {args.runs:,} runs x {args.features} features, stored verdicts "
          f"{result['verdicts_mb']:.0f} MB, written in {result['record_seconds']:.1f} s; "
          "chain verified")
    print(describe(result))
    for k, t in enumerate(result["tries"], start=1):
        print(f"  run {k}: {t['seconds']:.2f} s wall, {t['cpu_seconds']:.2f} s CPU, "
              f"peak RSS {t['peak_rss_mb']:.0f} MB, exit {t['returncode']}")
    if result["returncode"] != 0:
        print(result["stderr"], file=sys.stderr)
    return 0 if result["returncode"] == 0 and result["seconds"] <= 10.0 else 1


if __name__ == "__main__":
    raise SystemExit(main())
