"""Benchmark the database routes: ``python benchmarks/sql.py [--rows N] [--cols P]``.

Invented energy-use features (seeded), N x P doubles, checked three ways per backend:
streamed (Arrow batches into the one-pass statistics), push-down (sums inside the database)
and exported to Parquet first (export time + `gate.check` on the file). DuckDB always runs;
PostgreSQL runs when its server binaries are present (a throwaway cluster, tests/pg_server.py).
Also times reading the rows alone with the ADBC driver and with psycopg 3 (server-side cursor),
the measurement behind the driver choice.
"""

from __future__ import annotations

import argparse
import resource
import sys
import tempfile
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "tests"))

import gate
from gate.policy.models import parse_policy

POLICY = parse_policy("""
policy_version: 1
name: bench
columns: {include: ["*"], exclude: [], categorical: [], weight: null}
missing: drop_rows
""")


def energy_table(rows: int, cols: int, seed: int = 7) -> pa.Table:
    rng = np.random.default_rng(seed)
    base = rng.normal(size=(rows, cols))
    base[:, 1::7] += 0.8 * base[:, :1]  # some shared load: moderate VIFs, full rank
    return pa.table({f"meter_{j:03d}": base[:, j] * (1 + j) + 100.0 * j for j in range(cols)})


def timed(label: str, run: Callable[[], Any]) -> Any:
    start = time.perf_counter()
    result = run()
    print(f"  {label:<42} {time.perf_counter() - start:8.2f} s", flush=True)
    return result


def routes(url: str, name: str, folder: Path) -> None:
    def export() -> None:
        source = gate.sql(url, table=name)
        with pq.ParquetWriter(folder / f"{name}.parquet", pa.schema(
                [pa.field(c.name, pa.float64()) for c in source.columns])) as writer:
            for chunk in source.chunks([c.name for c in source.columns], 65_536):
                writer.write_table(chunk.cast(writer.schema))

    streamed = timed("streamed", lambda: gate.check(gate.sql(url, table=name), POLICY))
    pushed = timed("push-down", lambda: gate.check(gate.sql(url, table=name, push_down=True),
                                                   POLICY))
    timed("export to Parquet", export)
    timed("check the Parquet file", lambda: gate.check(folder / f"{name}.parquet", POLICY))
    a, b = pushed.diagnostics.correlation, streamed.diagnostics.correlation
    vif = np.max(np.abs(pushed.diagnostics.vif / streamed.diagnostics.vif - 1))
    print(f"  push-down vs streamed: max |r| diff {np.max(np.abs(a - b)):.1e}, "
          f"max VIF rel diff {vif:.1e}")


def read_only(url: str, name: str) -> None:
    import adbc_driver_postgresql.dbapi as adbc

    def with_adbc() -> int:
        rows = 0
        with adbc.connect(url) as conn, conn.cursor() as cur:
            cur.execute(f'SELECT * FROM "{name}"')
            for batch in cur.fetch_record_batch():
                rows += batch.num_rows
        return rows

    timed("read rows: ADBC (binary COPY -> Arrow)", with_adbc)
    try:
        import psycopg
    except ImportError:
        print("  read rows: psycopg not installed")
        return

    def with_psycopg() -> int:
        rows = 0
        plain = url.split("?")[0]
        query = dict(p.split("=", 1) for p in url.split("?")[1].split("&")) if "?" in url else {}
        from urllib.parse import unquote

        with psycopg.connect(plain, host=unquote(query.get("host", "")) or None,
                             port=query.get("port")) as conn, \
                conn.cursor(name="bench") as cur:
            cur.itersize = 65_536
            cur.execute(f'SELECT * FROM "{name}"')
            while block := cur.fetchmany(65_536):
                np.asarray(block, dtype=float)
                rows += len(block)
        return rows

    timed("read rows: psycopg 3 (server-side cursor)", with_psycopg)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=1_000_000)
    parser.add_argument("--cols", type=int, default=100)
    args = parser.parse_args()
    table = energy_table(args.rows, args.cols)
    print(f"{args.rows:,} x {args.cols} doubles ({table.nbytes / 1e6:.0f} MB)")
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        import duckdb

        path = folder / "energy.duckdb"
        con = duckdb.connect(str(path))
        con.register("incoming", table)
        con.execute("CREATE TABLE energy AS SELECT * FROM incoming")
        con.close()
        print("DuckDB (embedded)")
        routes(f"duckdb://{path}", "energy", folder)
        import pg_server

        if pg_server.find_bin() is None:
            print("PostgreSQL: server binaries not found; skipped")
        else:
            with pg_server.running_server() as server:
                timed("PostgreSQL: load the table (COPY)",
                      lambda: pg_server.load_table(server, "energy", table))
                print("PostgreSQL (local server, Unix socket)")
                read_only(server.url(), "energy")
                routes(server.url(), "energy", folder)
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(f"peak RSS of this process: {peak:.0f} MB")


if __name__ == "__main__":
    main()
