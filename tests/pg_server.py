"""A throwaway PostgreSQL cluster for the tests (and benchmarks/sql.py): initdb + pg_ctl on a Unix
socket in a temporary folder, password authentication, stopped and removed afterwards.

Root cannot run initdb, so when euid is 0 the server runs as the unprivileged user ``nobody``
(through ``runuser``); the folder is made accessible to it. No TCP listener is opened.
"""

from __future__ import annotations

import glob
import os
import shutil
import subprocess
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from urllib.parse import quote

USER = "gate_owner"
PASSWORD = "s3cret-Pw_for-gate-tests"  # grepped for in every artefact: must never appear
DATABASE = "features"
PORT = 54329


@dataclass(frozen=True)
class PgServer:
    socket_dir: Path
    user: str = USER
    password: str = PASSWORD
    database: str = DATABASE
    port: int = PORT

    def url(self, password: str | None = None) -> str:
        secret = self.password if password is None else password
        return (f"postgresql://{self.user}:{quote(secret, safe='')}@/{self.database}"
                f"?host={quote(str(self.socket_dir), safe='')}&port={self.port}")


def find_bin() -> Path | None:
    """The newest Debian postgresql server binaries folder, or None."""
    found = sorted(glob.glob("/usr/lib/postgresql/*/bin/initdb"),
                   key=lambda p: int(Path(p).parts[-3]) if Path(p).parts[-3].isdigit() else 0)
    return Path(found[-1]).parent if found else None


def _as_server_user(argv: list[str]) -> list[str]:
    if os.geteuid() != 0:
        return argv
    return ["runuser", "-u", "nobody", "--", *argv]


@contextmanager
def running_server() -> Iterator[PgServer]:
    """Start a cluster, create the database, yield it; stop and delete it on exit."""
    bin_dir = find_bin()
    if bin_dir is None:
        raise RuntimeError("PostgreSQL server binaries not found (run .ci/install-postgres)")
    root = Path(tempfile.mkdtemp(prefix="gate-pg-"))
    data, sock = root / "data", root / "sock"
    sock.mkdir()
    pwfile = root / "pw"
    pwfile.write_text(PASSWORD + "\n")
    if os.geteuid() == 0:
        shutil.chown(root, "nobody")
        shutil.chown(sock, "nobody")
        shutil.chown(pwfile, "nobody")
    root.chmod(0o755)
    sock.chmod(0o777)
    env = {**os.environ, "LC_ALL": "C", "LANG": "C"}
    log = root / "server.log"
    started = False
    try:
        subprocess.run(_as_server_user([
            str(bin_dir / "initdb"), "-D", str(data), "-U", USER, f"--pwfile={pwfile}",
            "--auth=scram-sha-256", "-E", "UTF8", "--no-sync"]),
            check=True, capture_output=True, env=env, cwd=root)
        if os.geteuid() == 0:
            shutil.chown(root, "nobody")  # pg_ctl writes the log here
        options = (f"-c listen_addresses='' -c unix_socket_directories='{sock}' -p {PORT} "
                   "-c fsync=off -c synchronous_commit=off -c full_page_writes=off "
                   "-c shared_buffers=128MB -c max_parallel_workers_per_gather=2")
        subprocess.run(_as_server_user([
            str(bin_dir / "pg_ctl"), "-D", str(data), "-l", str(log), "-o", options, "-w",
            "start"]), check=True, capture_output=True, env=env, cwd=root)
        started = True
        server = PgServer(sock)
        import adbc_driver_postgresql.dbapi as pg

        admin = (f"postgresql://{USER}:{quote(PASSWORD, safe='')}@/postgres"
                 f"?host={quote(str(sock), safe='')}&port={PORT}")
        with pg.connect(admin, autocommit=True) as conn, conn.cursor() as cur:
            cur.execute(f"CREATE DATABASE {DATABASE}")
        yield server
    finally:
        if started:
            subprocess.run(_as_server_user([str(bin_dir / "pg_ctl"), "-D", str(data), "-m",
                                            "fast", "-w", "stop"]),
                           check=False, capture_output=True, env=env, cwd=root)
        shutil.rmtree(root, ignore_errors=True)


def load_table(server: PgServer, name: str, table: object) -> None:
    """Replace table ``name`` with a pyarrow Table's rows (ADBC bulk ingest: COPY)."""
    import adbc_driver_postgresql.dbapi as pg

    with pg.connect(server.url(), autocommit=True) as conn, conn.cursor() as cur:
        cur.adbc_ingest(name, table, mode="replace")


def execute(server: PgServer, *statements: str) -> None:
    import adbc_driver_postgresql.dbapi as pg

    with pg.connect(server.url(), autocommit=True) as conn, conn.cursor() as cur:
        for statement in statements:
            cur.execute(statement)
