"""Benchmark of `gate history`: N runs of P features, rendered from an audit log and its store.

    PYTHONPATH=. python benchmarks/history.py [--runs 10000] [--features 100] [--keep DIR]

One real verdict of a P-feature invented table (fleet-maintenance sensors, seeded) is checked
once; N variants of it (time, label, VIFs drifting, findings coming and going, a policy change
and a waiver) are recorded in an audit log with their stored verdicts, the way `gate check
--audit-log` records them. Then `gate history` runs in a fresh process, and its wall time and
peak resident memory are reported. The target (issue 14): at most 10 s for 10,000 runs of 100
features, with memory bounded by the number of runs, not by the bytes of the verdicts.
"""

from __future__ import annotations

import argparse
import copy
import datetime as dt
import hashlib
import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

from gate.api import check
from gate.artefacts.audit import FORMAT, GENESIS, canonical, entry_hash, store_path, verify_chain
from gate.artefacts.verdict_json import verdict_json


def fleet_frame(rows: int, features: int, seed: int = 7) -> pd.DataFrame:
    """Invented fleet-maintenance sensor table: a few latent wear factors, so VIFs vary."""
    rng = np.random.default_rng(seed)
    latent = rng.normal(size=(rows, 6))
    mix = rng.normal(size=(6, features)) * (rng.uniform(size=features) < 0.3)
    data = latent @ mix + rng.normal(size=(rows, features))
    return pd.DataFrame(data, columns=[f"sensor_{k:03d}" for k in range(features)])


def write_record(folder: Path, runs: int, features: int) -> Path:
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
            entry = {"created_at": doc["created_at"], "format": FORMAT, "label": doc["label"],
                     "policy": {"name": doc["policy"]["name"],
                                "sha256": doc["policy"]["sha256"]},
                     "prev": prev, "seq": k + 1, "status": doc["status"],
                     "table": {"sha256": doc["table"]["sha256"],
                               "source": doc["table"]["source"]},
                     "tool": {"version": doc["tool"]["version"]}, "verdict": {"sha256": sha}}
            entry["hash"] = entry_hash(entry)
            prev = entry["hash"]
            handle.write(canonical(entry) + b"\n")
    return log


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--runs", type=int, default=10_000)
    parser.add_argument("--features", type=int, default=100)
    parser.add_argument("--keep", type=Path, help="write the record and output here")
    args = parser.parse_args()
    folder = args.keep or Path(tempfile.mkdtemp(prefix="gate-history-bench-"))
    t0 = time.perf_counter()
    log = write_record(folder, args.runs, args.features)
    made = time.perf_counter() - t0
    size = sum(p.stat().st_size for p in (folder / "verdicts").iterdir())
    report = verify_chain(log)
    assert report.ok, report.describe()
    print(f"record: {args.runs:,} runs x {args.features} features, verdicts {size / 1e6:.0f} MB, "
          f"written in {made:.1f} s; chain verified")
    env = dict(os.environ, PYTHONPATH=str(Path(__file__).resolve().parents[1]))
    t0 = time.perf_counter()
    result = subprocess.run([sys.executable, "-m", "gate", "history", str(log), "--out",
                             str(folder / "out"), "--horizon", "30"], env=env,
                            capture_output=True, text=True, check=False)
    wall = time.perf_counter() - t0
    peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024
    html = (folder / "out" / "history.html").stat().st_size / 1e6
    print(f"gate history: exit {result.returncode}, {wall:.2f} s wall (process start and "
          f"imports included), peak RSS {peak:.0f} MB, history.html {html:.1f} MB")
    if result.returncode != 0:
        print(result.stderr, file=sys.stderr)
    return 0 if result.returncode == 0 and wall <= 10.0 else 1


if __name__ == "__main__":
    raise SystemExit(main())
