"""Benchmark: the targets of issue 12, each printed as a measured ratio beside its target.

Run ``python -m gate.bench`` (many minutes; writes ~7 GB of seeded data into a temporary
folder and deletes it) or ``python -m gate.bench --quick`` (tiny sizes, seconds; a smoke run).
``--json FILE`` writes the same figures as JSON. This is a script, not a test: nothing here is
asserted, and timings depend on the machine, which is described in the output. Compare ratios
within one run: on a shared machine the absolute figures move with the load.

Every command runs as a whole process (``subprocess``; wall time from ``time.perf_counter``,
peak RSS from GNU time), alternating the commands ``--repeat`` times, fastest kept:

1. start-up: ``gate --version`` and ``gate --help`` / ``python -c pass``. Target <= 4.
2. 442 x 10 (the commit hook): ``gate check`` / a minimal script (import numpy and
   pyarrow.parquet, read, X'X): target <= 2.0; with ``--no-html``: target <= 1.4;
   ``gate check-files`` on 20 such tables / one ``gate check``: target <= 3.
3. 200,000 x 100 in process, from a PATH, in a fresh interpreter: the first ``gate.check(path)``
   / a minimal streamed script (both timed after their imports): target <= 1.5; statsmodels'
   ``variance_inflation_factor`` looped over all columns (timed on a sample of columns and
   extrapolated, said in the output) / that first call: target >= 1,000.
4. 1,000,000 x 100 (row groups of 131,072): ``gate check`` / the STREAMED floor (row group by
   row group into one reused buffer, centred X'X accumulated; run with OpenBLAS's threads and
   with one, the fastest counting): target <= 1.3. 10,000,000 x 50
   (pyarrow's default 1Mi-row row groups): peak RSS of ``gate check``, target <= 600 MB.
5. 20,000 x 2,000: ``gate check`` / the streamed floor: target <= 2.5. 20,000 rows x 10,000
   features: completes; time, peak RSS, verdict size and the pairs listed are reported.
(dask) 2 local worker processes, warm cluster: ``--engine dask`` / local on the 1M x 100 file.
6. `gate history LOG --out DIR` on an audit log of 10,000 runs x 100 features with its stored
   verdicts (benchmarks/history.py): wall, CPU and peak RSS of the whole process. Target <= 10 s.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import subprocess
import sys
import tempfile
import time
from collections.abc import Sequence
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

SEED = 20_260_501

#: The floor for the large tables (issue 12): a minimal STREAMED script. It reads the file row
#: group by row group, copies the columns into one reused column-major buffer, and folds each
#: group's centred X'X into a running total with the pairwise update of Chan, Golub & LeVeque
#: (1979) -- the least work any tool computing a centred X'X from this file can do.
STREAMED_GRAM = '''\
def streamed_gram(path):
    file = pq.ParquetFile(path, pre_buffer=False, buffer_size=1 << 18)
    meta = file.metadata
    p = meta.num_columns
    largest = max(meta.row_group(g).num_rows for g in range(meta.num_row_groups))
    buffer = np.empty((p, largest)).T  # column-major: contiguous column copies, one BLAS call
    total, mean, gram = 0, np.zeros(p), np.zeros((p, p))
    for group in range(meta.num_row_groups):
        table = file.read_row_group(group, use_threads=True)
        n = table.num_rows
        x = buffer[:n]
        for j, column in enumerate(table.columns):
            start = 0
            for chunk in column.chunks:  # float64, no nulls: the values buffer as it is
                k = len(chunk)
                x[start:start + k, j] = np.frombuffer(chunk.buffers()[1], dtype=np.float64,
                                                      count=chunk.offset + k)[chunk.offset:]
                start += k
        del table
        m = x.mean(axis=0)
        x -= m
        delta = m - mean
        gram += x.T @ x + np.outer(delta, delta) * (total * n / (total + n))
        mean += delta * (n / (total + n))
        total += n
    return gram
'''
FLOOR_SCRIPT = (
    "import sys\nimport numpy as np\nimport pyarrow.parquet as pq\n\n" + STREAMED_GRAM
    + "\ngram = streamed_gram(sys.argv[1])\nprint(gram.shape[0], float(gram[0, 0]))\n")

#: The floor for the small table: import numpy and pyarrow.parquet, read the file, form X'X.
#: ``ParquetFile.read`` rather than ``pq.read_table``: the latter imports pyarrow.dataset and,
#: through it, pandas (about half a second), which would flatter the gate.
SMALL_FLOOR_SCRIPT = '''\
import sys
import numpy as np
import pyarrow.parquet as pq

table = pq.ParquetFile(sys.argv[1]).read()
x = np.empty((table.num_columns, table.num_rows)).T
for j, column in enumerate(table.columns):
    chunk = column.combine_chunks()
    x[:, j] = np.frombuffer(chunk.buffers()[1], dtype=np.float64,
                            count=chunk.offset + len(chunk))[chunk.offset:]
x -= x.mean(axis=0)
gram = x.T @ x
print(gram.shape[0], float(gram[0, 0]))
'''

#: In a FRESH interpreter: import what the code needs (not timed), then time the first call from
#: a path, and a second call. argv: table, "gate" or "floor". Prints JSON.
IN_PROCESS_SCRIPT = '''\
import json
import sys
import time

''' + STREAMED_GRAM + '''
path, which = sys.argv[1], sys.argv[2]
if which == "gate":
    from gate import check  # loads the pipeline's modules (gate/__init__ is lazy)

    def once():
        return check(path)
else:
    import numpy as np  # the globals streamed_gram uses
    import pyarrow.parquet as pq

    def once():
        return streamed_gram(path)

start = time.perf_counter()
once()
first = time.perf_counter() - start
start = time.perf_counter()
once()
second = time.perf_counter() - start
print(json.dumps({"first": first, "second": second}))
'''


@dataclass
class Sizes:
    main: tuple[int, int]
    main_row_group: int
    peer: tuple[int, int]
    peer_sample: int
    stream: tuple[int, int]
    wide: tuple[int, int]
    widest: tuple[int, int]
    small: tuple[int, int] = (442, 10)
    small_files: int = 20


FULL = Sizes(main=(1_000_000, 100), main_row_group=131_072, peer=(200_000, 100), peer_sample=5,
             stream=(10_000_000, 50), wide=(20_000, 2_000), widest=(20_000, 10_000))
QUICK = Sizes(main=(20_000, 10), main_row_group=4_096, peer=(5_000, 10), peer_sample=3,
              stream=(60_000, 5), wide=(500, 60), widest=(400, 200), small_files=4)
NAMES = ("startup", "small", "main", "peer", "stream", "wide", "widest", "dask", "history")


@dataclass
class Run:
    seconds: float
    peak_rss_mb: float
    returncode: int


@dataclass
class Pair:
    """Fastest of ``repeat`` alternating runs of each command."""

    gate: list[Run] = field(default_factory=list)
    floor: list[Run] = field(default_factory=list)

    @property
    def gate_seconds(self) -> float:
        return min(r.seconds for r in self.gate)

    @property
    def floor_seconds(self) -> float:
        return min(r.seconds for r in self.floor)

    @property
    def ratio(self) -> float:
        return self.gate_seconds / self.floor_seconds


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m gate.bench", description=__doc__,
                                     formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--quick", action="store_true", help="tiny sizes (a smoke run)")
    parser.add_argument("--json", metavar="FILE", type=Path, help="also write figures as JSON")
    parser.add_argument("--repeat", type=int, default=None,
                        help="alternating runs per command (default 2, quick 1)")
    parser.add_argument("--keep", metavar="DIR", type=Path,
                        help="generate the data here and keep it (reused when present)")
    parser.add_argument("--skip", metavar="NAME", action="append", default=[],
                        choices=NAMES,
                        help="leave out one measurement (repeatable)")
    parser.add_argument("--sql", metavar="ROWS", type=int,
                        help="also the database routes (benchmarks/sql.py) on ROWS x 100: "
                        "DuckDB always, PostgreSQL when its server binaries are present; "
                        "streamed, push-down and exported to Parquet first (optional section)")
    args = parser.parse_args(argv)
    # The `gate` command lets OpenBLAS's idle threads sleep early (gate.cli.main); the floors and
    # the peer run with the same setting, so the ratios compare like with like.
    from gate.cli.main import OPENBLAS_THREAD_TIMEOUT

    os.environ.setdefault("OPENBLAS_THREAD_TIMEOUT", OPENBLAS_THREAD_TIMEOUT)
    sizes = QUICK if args.quick else FULL
    repeat = args.repeat or (1 if args.quick else 2)

    report: dict[str, Any] = {"mode": "quick" if args.quick else "full", "repeat": repeat,
                              "machine": machine(), "results": {}}
    _print_machine(report["machine"])
    with tempfile.TemporaryDirectory(prefix="gate-bench-") as scratch:
        folder = args.keep or Path(scratch)
        folder.mkdir(parents=True, exist_ok=True)
        floor = folder / "floor.py"
        floor.write_text(FLOOR_SCRIPT)
        results = report["results"]
        if "startup" not in args.skip:
            results["startup"] = bench_startup(max(3, 3 * repeat))
        if "small" not in args.skip:
            results["small"] = bench_small(folder, max(3, repeat), sizes)
        main_file = folder / f"main_{sizes.main[0]}x{sizes.main[1]}.parquet"
        if "main" not in args.skip or "dask" not in args.skip:
            write_parquet(main_file, *sizes.main, row_group=sizes.main_row_group)
        if "main" not in args.skip:
            results["main"] = bench_versus_floor(
                "main", main_file, floor, folder, repeat, target=1.3, sizes=sizes.main,
                note=f"row groups of {sizes.main_row_group:,} rows")
        if "peer" not in args.skip:
            results["peer"] = bench_peer(folder, sizes, repeat)
        if "stream" not in args.skip:
            stream_file = folder / f"stream_{sizes.stream[0]}x{sizes.stream[1]}.parquet"
            write_parquet(stream_file, *sizes.stream, row_group=None)
            results["stream"] = bench_versus_floor(
                "stream", stream_file, floor, folder, repeat, target=None, sizes=sizes.stream,
                note="pyarrow's default row groups (1Mi rows)", rss_target_mb=600.0)
        if "wide" not in args.skip:
            wide_file = folder / f"wide_{sizes.wide[0]}x{sizes.wide[1]}.parquet"
            write_parquet(wide_file, *sizes.wide, row_group=None)
            results["wide"] = bench_versus_floor(
                "wide", wide_file, floor, folder, repeat, target=2.5, sizes=sizes.wide)
        if "widest" not in args.skip:
            results["widest"] = bench_widest(folder, sizes)
        if "dask" not in args.skip:
            results["dask"] = bench_dask(main_file, folder, repeat, sizes)
        if "history" not in args.skip:  # (6) `gate history`, see benchmarks/history.py
            from benchmarks.history import bench_history

            _progress("gate history")
            runs = 500 if args.quick else 10_000
            results["history"] = bench_history(folder / f"history_{runs}", runs, 100, repeat)
        if args.sql:  # (7) optional: DuckDB / PostgreSQL, three routes each
            _progress(f"database routes, {args.sql:,} x 100")
            done = subprocess.run([sys.executable, str(Path(__file__).with_name("sql.py")),
                                   "--rows", str(args.sql), "--cols", "100"],
                                  capture_output=True, text=True, check=False)
            results["sql"] = {"returncode": done.returncode,
                              "output": (done.stdout + done.stderr).splitlines()}
    report["load_average_end"] = list(os.getloadavg())
    _print_table(report)
    if "sql" in report["results"]:
        print("(7) database routes (benchmarks/sql.py):")
        print("\n".join(f"    {line}" for line in report["results"]["sql"]["output"]))
    if args.json:
        args.json.write_text(json.dumps(report, indent=2) + "\n")
        print(f"wrote {args.json}")
    return 0


# --- data ----------------------------------------------------------------------------------------

def write_parquet(path: Path, rows: int, columns: int, *, row_group: int | None,
                  seed_offset: int = 0) -> None:
    """Seeded invented fleet-telemetry features: a few latent drivers (load, speed, ambient
    temperature...) mixed into every column plus noise, so columns correlate as real sensor
    features do, without exact dependencies. Written in slices to bound memory."""
    if path.exists():
        return
    import numpy as np
    import pyarrow as pa
    import pyarrow.parquet as pq

    rng = np.random.default_rng(SEED + rows + columns + 7919 * seed_offset)
    latent = 6
    mixing = rng.standard_normal((latent, columns)) * 0.35
    names = [f"sensor_{j:04d}" for j in range(columns)]
    schema = pa.schema([(name, pa.float64()) for name in names])
    step = row_group or (1 << 20)  # one row group per step (pyarrow's default: 1Mi rows)
    # Generated in slices of about 64 MB, so even the 20,000 x 10,000 table fits in memory.
    piece = max(1, min(step, (64 << 20) // (8 * columns)))
    partial = path.with_suffix(".partial")
    with pq.ParquetWriter(partial, schema) as writer:
        for start in range(0, rows, step):
            n = min(step, rows - start)
            slices = []
            for offset in range(0, n, piece):
                k = min(piece, n - offset)
                block = rng.standard_normal((k, latent)) @ mixing \
                    + rng.standard_normal((k, columns))
                slices.append(pa.table({name: block[:, j] for j, name in enumerate(names)},
                                       schema=schema))
                del block
            writer.write_table(pa.concat_tables(slices), row_group_size=step)
    partial.rename(path)  # an interrupted run leaves no half-written table to reuse


# --- measurements ---------------------------------------------------------------------------------

def run(command: Sequence[str], env: dict[str, str] | None = None) -> Run:
    """Wall time and peak RSS of one whole process.

    Peak RSS comes from GNU time (``/usr/bin/time -f %M``) when present: a child forked from
    this (large) process inherits its RSS high-water mark in ``ru_maxrss``, so ``wait4`` here
    would over-report small children; GNU time is a small parent. Otherwise ``wait4``.
    """
    timer = Path("/usr/bin/time")
    with tempfile.NamedTemporaryFile(prefix="gate-bench-rss-", suffix=".txt") as rss_file:
        prefix = [str(timer), "-f", "%M", "-o", rss_file.name] if timer.exists() else []
        start = time.perf_counter()
        process = subprocess.Popen([*prefix, *command], stdout=subprocess.DEVNULL,
                                   stderr=subprocess.PIPE, env=env)
        _, status, usage = os.wait4(process.pid, 0)
        seconds = time.perf_counter() - start
        returncode = os.waitstatus_to_exitcode(status)
        stderr = process.stderr.read().decode(errors="replace") if process.stderr else ""
        if process.stderr:
            process.stderr.close()
        process.returncode = returncode
        peak_kb = float(usage.ru_maxrss)
        if prefix:
            text = Path(rss_file.name).read_text().split()
            peak_kb = float(text[-1]) if text and text[-1].isdigit() else peak_kb
    if returncode not in (0, 1):
        raise RuntimeError(f"{' '.join(command)} exited {returncode}: {stderr[-2000:]}")
    return Run(seconds, peak_kb / 1024.0, returncode)


def gate_command(table: Path, out: Path, *extra: str) -> list[str]:
    return [sys.executable, "-m", "gate", "check", str(table), "--out", str(out), "--quiet",
            *extra]


def bench_startup(repeat: int) -> dict[str, Any]:
    """`gate --version` and `gate --help` against a bare interpreter (`python -c pass`)."""
    _progress("startup: python -c pass, gate --version, gate --help")
    commands = {"python": [sys.executable, "-c", "pass"],
                "version": [sys.executable, "-m", "gate", "--version"],
                "help": [sys.executable, "-m", "gate", "--help"]}
    runs: dict[str, list[Run]] = {k: [] for k in commands}
    for _ in range(repeat):
        for key, command in commands.items():
            runs[key].append(run(command))
    best = {k: min(r.seconds for r in v) for k, v in runs.items()}
    return {"python_seconds": best["python"], "version_seconds": best["version"],
            "help_seconds": best["help"], "version_ratio": best["version"] / best["python"],
            "help_ratio": best["help"] / best["python"], "target_ratio": 4.0,
            "load_average": list(os.getloadavg())}


def bench_small(folder: Path, repeat: int, sizes: Sizes) -> dict[str, Any]:
    """The commit-hook case: `gate check` on a small table (with and without the HTML summary)
    against a minimal script, and `gate check-files` on many small tables against one check."""
    rows, columns = sizes.small
    tables = []
    for k in range(sizes.small_files):
        path = folder / f"small_{k:02d}_{rows}x{columns}.parquet"
        write_parquet(path, rows, columns, row_group=None, seed_offset=k)
        tables.append(path)
    script = folder / "small_floor.py"
    script.write_text(SMALL_FLOOR_SCRIPT)
    _progress(f"small: {rows} x {columns}; check-files on {len(tables)} tables")
    floor, check, no_html, files = [], [], [], []
    files_command = [sys.executable, "-m", "gate", "check-files", *map(str, tables), "--out",
                     str(folder / "out-small-files")]
    for _ in range(repeat):
        floor.append(run([sys.executable, str(script), str(tables[0])]))
        check.append(run(gate_command(tables[0], folder / "out-small")))
        no_html.append(run(gate_command(tables[0], folder / "out-small-nohtml", "--no-html")))
        files.append(run(files_command))
    best = {k: min(r.seconds for r in v) for k, v in
            (("floor", floor), ("check", check), ("no_html", no_html), ("files", files))}
    return {
        "rows": rows, "columns": columns, "floor_seconds": best["floor"],
        "check_seconds": best["check"], "check_no_html_seconds": best["no_html"],
        "ratio": best["check"] / best["floor"], "target_ratio": 2.0,
        "ratio_no_html": best["no_html"] / best["floor"], "target_ratio_no_html": 1.4,
        "files": len(tables), "check_files_seconds": best["files"],
        "check_files_ratio": best["files"] / best["check"], "target_check_files_ratio": 3.0,
        "load_average": list(os.getloadavg()),
    }


def bench_widest(folder: Path, sizes: Sizes) -> dict[str, Any]:
    """p = 10,000 features: completes? peak memory, time, verdict size and pair findings."""
    rows, columns = sizes.widest
    path = folder / f"widest_{rows}x{columns}.parquet"
    write_parquet(path, rows, columns, row_group=None)
    _progress(f"widest: {rows:,} x {columns:,} (one run; minutes)")
    out = folder / "out-widest"
    result = run(gate_command(path, out, "--no-html"))
    verdict = json.loads((out / "verdict.json").read_text())
    diagnostics = verdict["diagnostics"]
    return {"rows": rows, "columns": columns, "file_mb": path.stat().st_size / 1e6,
            "gate_seconds": result.seconds, "gate_peak_rss_mb": result.peak_rss_mb,
            "gram_mb": columns * columns * 8 / 1e6,
            "verdict_json_mb": (out / "verdict.json").stat().st_size / 1e6,
            "pairs_listed": len(diagnostics["pairs"]), "findings": len(verdict["findings"]),
            "variance_proportion_rows": len(diagnostics["variance_proportions"] or []),
            "status": verdict["status"], "load_average": list(os.getloadavg())}


def bench_versus_floor(name: str, table: Path, floor: Path, folder: Path, repeat: int, *,
                       target: float | None, sizes: tuple[int, int], note: str = "",
                       rss_target_mb: float | None = None) -> dict[str, Any]:
    pair = Pair()
    _progress(f"{name}: {sizes[0]:,} x {sizes[1]:,} ({note or 'default layout'})")
    # The floor runs with OpenBLAS's threads and with one (the gate limits itself to one while
    # it hashes; on 2 cores one thread can be the faster floor too): the fastest run counts.
    one_thread = {**os.environ, "OPENBLAS_NUM_THREADS": "1"}
    for _ in range(repeat):
        pair.floor.append(run([sys.executable, str(floor), str(table)]))
        pair.floor.append(run([sys.executable, str(floor), str(table)], env=one_thread))
        pair.gate.append(run(gate_command(table, folder / f"out-{name}")))
    result: dict[str, Any] = {
        "rows": sizes[0], "columns": sizes[1], "file_mb": table.stat().st_size / 1e6,
        "note": note, "gate_seconds": pair.gate_seconds, "floor_seconds": pair.floor_seconds,
        "ratio": pair.ratio, "target_ratio": target,
        "gate_peak_rss_mb": min(r.peak_rss_mb for r in pair.gate),
        "floor_peak_rss_mb": min(r.peak_rss_mb for r in pair.floor),
        "runs": {"gate": [asdict(r) for r in pair.gate], "floor": [asdict(r) for r in pair.floor]},
        "load_average": list(os.getloadavg()),
    }
    if rss_target_mb is not None:
        result["target_peak_rss_mb"] = rss_target_mb
    return result


def bench_peer(folder: Path, sizes: Sizes, repeat: int) -> dict[str, Any]:
    """The gate vs statsmodels' variance_inflation_factor looped over every column, measured
    the honest way: the gate's FIRST call from a PATH in a fresh interpreter (after its
    imports), against the loop's time extrapolated from a sample of columns; and that first
    call against a minimal streamed script in a fresh interpreter (after numpy + pyarrow)."""
    import numpy as np
    import pyarrow.parquet as pq

    rows, columns = sizes.peer
    table_path = folder / f"peer_{rows}x{columns}.parquet"
    write_parquet(table_path, rows, columns, row_group=None)
    script = folder / "in_process.py"
    script.write_text(IN_PROCESS_SCRIPT)
    _progress(f"peer: {rows:,} x {columns:,}, statsmodels on {sizes.peer_sample} columns")
    from statsmodels.stats.outliers_influence import variance_inflation_factor

    table = pq.read_table(table_path)
    values = np.column_stack([np.asarray(c.combine_chunks()) for c in table.columns])
    del table
    exog = np.column_stack([np.ones(rows), values])  # the constant, as statsmodels' docs advise
    del values
    sample = np.linspace(1, columns, sizes.peer_sample).round().astype(int)
    loop_times = []
    peer_vif = {}
    for j in sample:
        start = time.perf_counter()
        peer_vif[int(j)] = float(variance_inflation_factor(exog, int(j)))
        loop_times.append(time.perf_counter() - start)
    del exog
    per_column = float(np.mean(loop_times))
    loop_seconds = per_column * columns

    fresh: dict[str, list[dict[str, float]]] = {"gate": [], "floor": []}
    for _ in range(repeat):
        for which in ("floor", "gate"):
            done = subprocess.run([sys.executable, str(script), str(table_path), which],
                                  capture_output=True, text=True, check=True)
            fresh[which].append(json.loads(done.stdout.strip().splitlines()[-1]))
    first = min(r["first"] for r in fresh["gate"])
    second = min(r["second"] for r in fresh["gate"])
    floor_first = min(r["first"] for r in fresh["floor"])
    process = min((run(gate_command(table_path, folder / "out-peer")) for _ in range(repeat)),
                  key=lambda r: r.seconds)
    verdict = json.loads((folder / "out-peer" / "verdict.json").read_text())
    vif = verdict["diagnostics"]["vif"]
    names = verdict["features"]
    agreement = max(abs(vif[names[j - 1]] / peer_vif[j] - 1.0) for j in peer_vif)
    return {
        "rows": rows, "columns": columns, "sampled_columns": len(sample),
        "statsmodels_seconds_per_column": per_column,
        "statsmodels_loop_seconds_extrapolated": loop_seconds,
        "gate_in_process_seconds": first, "gate_in_process_second_call_seconds": second,
        "floor_in_process_seconds": floor_first, "in_process_ratio": first / floor_first,
        "target_in_process_ratio": 1.5,
        "gate_process_seconds": process.seconds,
        "speedup_in_process": loop_seconds / first,
        "speedup_whole_process": loop_seconds / process.seconds,
        "target_speedup": 1000.0,
        "max_relative_vif_difference_on_sample": agreement,
        "load_average": list(os.getloadavg()),
    }


def bench_dask(table: Path, folder: Path, repeat: int, sizes: Sizes) -> dict[str, Any]:
    from distributed import Client, LocalCluster

    _progress("dask: starting a local cluster (2 worker processes, 1 thread each)")
    start = time.perf_counter()
    cluster = LocalCluster(  # type: ignore[no-untyped-call]
        n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None)
    client = Client(cluster)  # type: ignore[no-untyped-call]
    client.wait_for_workers(2)
    startup = time.perf_counter() - start
    try:
        local_out, dask_out = folder / "out-dask-local", folder / "out-dask"
        dask_extra = ("--engine", "dask", "--scheduler", cluster.scheduler_address)
        run(gate_command(table, dask_out, *dask_extra))  # warm the workers' imports
        local_runs, dask_runs = [], []
        for _ in range(repeat):
            local_runs.append(run(gate_command(table, local_out)))
            dask_runs.append(run(gate_command(table, dask_out, *dask_extra)))
    finally:
        client.close()  # type: ignore[no-untyped-call]
        cluster.close()
    difference = _max_relative_difference(local_out / "verdict.json", dask_out / "verdict.json")
    local_seconds = min(r.seconds for r in local_runs)
    dask_seconds = min(r.seconds for r in dask_runs)
    return {
        "rows": sizes.main[0], "columns": sizes.main[1], "workers": 2,
        "cluster_startup_seconds": startup, "local_seconds": local_seconds,
        "dask_seconds": dask_seconds, "ratio": dask_seconds / local_seconds,
        "target_ratio": 1.5, "max_relative_difference": difference,
        "load_average": list(os.getloadavg()),
    }


def _max_relative_difference(a: Path, b: Path) -> float:
    left, right = (json.loads(p.read_text())["diagnostics"] for p in (a, b))
    worst = 0.0
    pairs = [(left["vif"][k], right["vif"][k]) for k in left["vif"]]
    pairs += list(zip(left["condition_indices"], right["condition_indices"]))
    for x, y in pairs:
        if x is not None and y is not None and x != 0:
            worst = max(worst, abs(x - y) / abs(x))
    return worst


# --- machine and printing ---------------------------------------------------------------------

def machine() -> dict[str, Any]:
    import numpy as np
    import pyarrow as pa
    from threadpoolctl import threadpool_info

    del np
    blas = [{k: info.get(k) for k in ("internal_api", "version", "architecture", "num_threads",
                                      "threading_layer")}
            for info in threadpool_info() if info.get("user_api") == "blas"]
    return {
        "cores": os.cpu_count(), "platform": platform.platform(),
        "processor": platform.processor() or platform.machine(),
        "python": platform.python_version(), "pyarrow": pa.__version__,
        "numpy": __import__("numpy").__version__, "blas": blas,
        "openblas_env": {k: v for k, v in os.environ.items() if k.startswith("OPENBLAS")},
        "memory_gb": _memory_gb(), "load_average_start": list(os.getloadavg()),
    }


def _memory_gb() -> float | None:
    try:
        pages = os.sysconf("SC_PHYS_PAGES") * os.sysconf("SC_PAGE_SIZE")
    except (ValueError, OSError):
        return None
    return round(pages / 2**30, 1)


def _progress(text: str) -> None:
    print(f"... {text}", file=sys.stderr, flush=True)


def _print_machine(info: dict[str, Any]) -> None:
    blas = ", ".join(f"{b['internal_api']} {b['version']} kernel {b['architecture']} "
                     f"{b['num_threads']} threads" for b in info["blas"]) or "unknown"
    print(f"machine: {info['cores']} cores, {info['memory_gb']} GiB, {info['platform']}")
    print(f"  python {info['python']}, numpy {info['numpy']}, pyarrow {info['pyarrow']}")
    print(f"  BLAS: {blas}; env {info['openblas_env'] or '-'}")
    print(f"  load average at start: {', '.join(f'{v:.2f}' for v in info['load_average_start'])}")


def _print_table(report: dict[str, Any]) -> None:
    r = report["results"]
    lines = [(f"\nbenchmark ({report['mode']}; fastest of {report['repeat']} alternating runs; "
              "every ratio compares figures from this one run)")]

    def verdict(ok: bool) -> str:
        return "meets target" if ok else "MISSES target"

    if "startup" in r:
        x = r["startup"]
        worst = max(x["version_ratio"], x["help_ratio"])
        lines.append(
            f"(1) start-up: python -c pass {x['python_seconds']:.3f} s; gate --version "
            f"{x['version_seconds']:.3f} s ({x['version_ratio']:.2f}x), gate --help "
            f"{x['help_seconds']:.3f} s ({x['help_ratio']:.2f}x) (target <= 4x: "
            f"{verdict(worst <= 4.0)})")
    if "small" in r:
        x = r["small"]
        lines.append(
            f"(2) {x['rows']} x {x['columns']}: minimal script {x['floor_seconds']:.2f} s; gate "
            f"check {x['check_seconds']:.2f} s ({x['ratio']:.2f}x, target <= 2.0: "
            f"{verdict(x['ratio'] <= 2.0)}); --no-html {x['check_no_html_seconds']:.2f} s "
            f"({x['ratio_no_html']:.2f}x, target <= 1.4: {verdict(x['ratio_no_html'] <= 1.4)})"
            f"; check-files on {x['files']} tables {x['check_files_seconds']:.2f} s "
            f"({x['check_files_ratio']:.2f}x one check, target <= 3: "
            f"{verdict(x['check_files_ratio'] <= 3.0)})")
    if "peer" in r:
        x = r["peer"]
        lines.append(
            f"(3) {x['rows']:,} x {x['columns']:,} from a path, fresh interpreter: first "
            f"gate.check {x['gate_in_process_seconds']:.3f} s (second "
            f"{x['gate_in_process_second_call_seconds']:.3f} s) vs minimal streamed script "
            f"{x['floor_in_process_seconds']:.3f} s: {x['in_process_ratio']:.2f}x (target <= "
            f"1.5: {verdict(x['in_process_ratio'] <= 1.5)}); statsmodels "
            f"variance_inflation_factor {x['statsmodels_seconds_per_column']:.2f} s/column, "
            f"timed on {x['sampled_columns']} columns and extrapolated to {x['columns']}: "
            f"{x['statsmodels_loop_seconds_extrapolated']:.1f} s -> "
            f"{x['speedup_in_process']:,.0f}x the first call (target >= 1,000x: "
            f"{verdict(x['speedup_in_process'] >= 1000)}); whole `gate check` process "
            f"{x['gate_process_seconds']:.2f} s -> {x['speedup_whole_process']:,.0f}x; VIFs "
            f"agree to {x['max_relative_vif_difference_on_sample']:.1e}")
    for key, title in (("main", "4"), ("stream", "4"), ("wide", "5")):
        if key not in r:
            continue
        x = r[key]
        line = (f"({title}) {x['rows']:,} x {x['columns']:,}: gate {x['gate_seconds']:.2f} s, "
                f"streamed floor {x['floor_seconds']:.2f} s, ratio {x['ratio']:.2f}")
        if x.get("target_ratio"):
            line += f" (target <= {x['target_ratio']}: {verdict(x['ratio'] <= x['target_ratio'])})"
        line += f"; peak RSS gate {x['gate_peak_rss_mb']:.0f} MB, floor {x['floor_peak_rss_mb']:.0f} MB"
        if x.get("target_peak_rss_mb"):
            ok = x["gate_peak_rss_mb"] <= x["target_peak_rss_mb"]
            line += f" (target <= {x['target_peak_rss_mb']:.0f} MB: {verdict(ok)})"
        lines.append(line)
    if "widest" in r:
        x = r["widest"]
        lines.append(
            f"(5) {x['rows']:,} x {x['columns']:,} ({x['file_mb']:,.0f} MB file, one run, "
            f"--no-html): {x['gate_seconds']:.1f} s, peak RSS {x['gate_peak_rss_mb']:,.0f} MB "
            f"(one p x p matrix is {x['gram_mb']:,.0f} MB); verdict.json "
            f"{x['verdict_json_mb']:.1f} MB, {x['pairs_listed']:,} pairs listed, "
            f"{x['findings']:,} findings, status {x['status']}")
    if "dask" in r:
        x = r["dask"]
        lines.append(
            f"(dask) 2 local workers, {x['rows']:,} x {x['columns']:,}: cluster start-up "
            f"{x['cluster_startup_seconds']:.1f} s (separate); warm: dask "
            f"{x['dask_seconds']:.2f} s vs local {x['local_seconds']:.2f} s, ratio "
            f"{x['ratio']:.2f} (target <= 1.5: {verdict(x['ratio'] <= 1.5)}); diagnostics "
            f"agree to {x['max_relative_difference']:.1e}")
    if "history" in r:
        from benchmarks.history import describe

        lines.append(f"(6) {describe(r['history'])}")
    lines.append(f"load average at end: {', '.join(f'{v:.2f}' for v in report['load_average_end'])}")
    print("\n".join(lines))


if __name__ == "__main__":
    raise SystemExit(main())
