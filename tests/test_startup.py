"""Start-up cost (issue 12): `gate --version`, `gate --help` and `import gate` load no numeric
stack, and `gate check --no-html` on a full-rank table loads neither pandas, great-tables nor
scipy (numpy's LAPACK serves the full-rank kernels).

These assert WHICH modules a fresh interpreter imports (read from ``python -X importtime``,
which lists every module as it is first imported), never timings: timings belong to
``python -m gate.bench``, modules are what make the difference and do not depend on the load of
the machine.
"""

from __future__ import annotations

import importlib.util
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

ROOT = Path(__file__).resolve().parents[1]
HEAVY = ("numpy", "pandas", "pyarrow", "scipy", "pydantic", "great_tables", "yaml")


def imported_modules(*args: str, cwd: Path | None = None) -> tuple[set[str], str]:
    """Top-level packages and full module names a fresh ``python -X importtime ARGS`` imports,
    and its stdout."""
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    result = subprocess.run([sys.executable, "-X", "importtime", *args], capture_output=True,
                            text=True, timeout=120, check=False, env=env, cwd=cwd)
    assert result.returncode in (0, 1), result.stderr[-3000:]
    modules = set()
    for line in result.stderr.splitlines():
        if line.startswith("import time:") and line.count("|") == 2:
            name = line.rsplit("|", 1)[1].strip()
            if name != "imported package":
                modules.update((name, name.split(".")[0]))
    assert "gate" in modules  # the probe really saw the imports
    return modules, result.stdout


@pytest.mark.parametrize("flag", ["--version", "--help"])
def test_version_and_help_import_no_numeric_stack(flag: str) -> None:
    modules, out = imported_modules("-m", "gate", flag)
    assert out.startswith("gate ") if flag == "--version" else "check-files" in out
    assert not modules & set(HEAVY), sorted(modules & set(HEAVY))


def test_subcommand_help_imports_no_numeric_stack() -> None:
    modules, out = imported_modules("-m", "gate", "check", "--help")
    assert "--no-html" in out
    assert not modules & set(HEAVY), sorted(modules & set(HEAVY))


def test_import_gate_is_lazy_and_the_public_names_still_load() -> None:
    modules, _ = imported_modules("-c", "import gate; assert 'check' in gate.__all__")
    assert not modules & set(HEAVY), sorted(modules & set(HEAVY))
    modules, _ = imported_modules("-c", "from gate import check, Verdict; print(check)")
    assert {"numpy", "pyarrow"} <= modules  # the lazy names did load the pipeline


def test_check_without_html_imports_neither_pandas_great_tables_nor_scipy(tmp_path: Path) -> None:
    rng = np.random.default_rng(20_260_512)  # invented fleet-maintenance readings
    values = rng.standard_normal((300, 4))
    pq.write_table(pa.table({f"gauge_{j}": values[:, j] for j in range(4)}),
                   tmp_path / "fleet.parquet")
    modules, _ = imported_modules("-m", "gate", "check", "fleet.parquet", "--out", "o",
                                  "--quiet", "--no-html", cwd=tmp_path)
    assert {"numpy", "pyarrow"} <= modules
    heavy = {"pandas", "polars", "great_tables", "scipy"}
    assert not modules & heavy, sorted(modules & heavy)
    assert "pyarrow.compute" not in modules  # float64 columns need no casting or encoding
    assert (tmp_path / "o" / "verdict.json").is_file()
    assert not (tmp_path / "o" / "summary.html").exists()


def test_check_with_html_renders_from_polars_without_importing_pandas(tmp_path: Path) -> None:
    """summary.html is built from polars frames (great-tables' cheapest input), so a Parquet
    table's whole check, page included, never imports pandas (0.3 s)."""
    rng = np.random.default_rng(20_260_515)  # invented energy-meter readings
    values = rng.standard_normal((200, 3))
    pq.write_table(pa.table({f"meter_{j}": values[:, j] for j in range(3)}),
                   tmp_path / "meters.parquet")
    modules, _ = imported_modules("-m", "gate", "check", "meters.parquet", "--out", "o",
                                  "--quiet", cwd=tmp_path)
    assert {"polars", "great_tables"} <= modules
    assert "pandas" not in modules
    assert "meter_2" in (tmp_path / "o" / "summary.html").read_text()


@pytest.mark.skipif(importlib.util.find_spec("IPython") is None,
                    reason="IPython is not installed here, so nothing could import it")
@pytest.mark.parametrize("command", ["check", "check-files"])
def test_rendering_commands_never_import_ipython(tmp_path: Path, command: str) -> None:
    """great-tables asks on every render whether it runs in an IPython terminal by importing
    IPython (0.45 s where Jupyter is installed); the `gate` command answers "not installed".
    A blocked import still leaves one line in -X importtime, a real one loads IPython.core."""
    rng = np.random.default_rng(20_261_202)  # invented bike-share dock counts
    values = rng.standard_normal((120, 3))
    pq.write_table(pa.table({f"docks_{j}": values[:, j] for j in range(3)}),
                   tmp_path / "docks.parquet")
    modules, _ = imported_modules("-m", "gate", command, "docks.parquet", "--out", "o",
                                  cwd=tmp_path)
    assert "great_tables" in modules
    assert not {m for m in modules if m.startswith("IPython.")}


def test_preload_modules_loads_on_a_thread_and_ignores_failures() -> None:
    script = (
        "import sys, threading\n"
        "from gate.preload import preload_modules\n"
        "assert 'xml.dom.minidom' not in sys.modules\n"
        "preload_modules('gate_no_such_module', 'xml.dom.minidom', thread_name='t')\n"
        "[t.join() for t in threading.enumerate() if t.name == 't']\n"
        "preload_modules('xml.dom.minidom', thread_name='again')\n"
        "print('xml.dom.minidom' in sys.modules,\n"
        "      any(t.name == 'again' for t in threading.enumerate()))\n")
    done = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True,
                          cwd=ROOT, check=True, timeout=120)
    assert done.stdout.split() == ["True", "False"]  # loaded; nothing left to start


def test_check_preloads_scipy_only_when_the_top_rows_route_will_run(tmp_path: Path) -> None:
    """A design whose scaled factor reaches TOP_ROWS_MIN_ORDER has scipy.linalg imported
    beside the main pass (the route needs it); the small-table test above shows that a
    narrower design never loads scipy. The limit is lowered here so a 6-column table reaches
    it."""
    rng = np.random.default_rng(20_260_516)  # invented bike-dock counts
    values = rng.standard_normal((120, 6))
    pq.write_table(pa.table({f"dock_{j}": values[:, j] for j in range(6)}),
                   tmp_path / "docks.parquet")
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    seen = []
    for limit in ("gate.api.TOP_ROWS_MIN_ORDER", "7"):  # as shipped (control), then lowered
        script = (
            "import sys, threading\n"
            "import gate.api\n"
            f"gate.api.TOP_ROWS_MIN_ORDER = {limit}\n"
            "gate.api.check('docks.parquet')\n"
            "[t.join() for t in threading.enumerate() if t.name == 'gate-preload-scipy']\n"
            "print('scipy.linalg' in sys.modules)\n")
        done = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True,
                              cwd=tmp_path, env=env, check=True, timeout=120)
        seen.append(done.stdout.strip())
    assert seen == ["False", "True"]


def _collector_around_main(setup: str, probe: str) -> list[list[str]]:
    """In a fresh interpreter: ``probe`` (a Python expression, printed) after ``main([...])``
    (a caller's process) and after ``main()`` (the command's process), both on a command that
    exits through argparse."""
    script = (
        "import gc, sys\n"
        f"{setup}\n"
        "from gate.cli.main import main\n"
        "for argv in (['policy', 'init', '--help'], None):\n"
        "    if argv is None:\n"
        "        sys.argv = ['gate', 'policy', 'init', '--help']\n"
        "    try:\n"
        "        main(argv)\n"
        "    except SystemExit:\n"
        "        pass\n"
        f"    print('GC', {probe})\n")
    done = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True,
                          cwd=ROOT, check=True, timeout=120)
    return [line.split()[1:] for line in done.stdout.splitlines() if line.startswith("GC ")]


def test_the_command_leaves_its_objects_to_the_operating_system_at_exit() -> None:
    """As the command (``main()``), the process freezes the collector before it exits (the
    teardown's cycle collection cost 0.06-0.25 s); ``main([...])`` from a caller's process does
    not touch the caller's collector."""
    seen = _collector_around_main("", "gc.isenabled(), gc.get_freeze_count() > 0")
    assert seen == [["True", "False"], ["False", "True"]]


def test_the_command_collects_less_often_and_callers_keep_their_thresholds() -> None:
    seen = _collector_around_main(
        "before = gc.get_threshold()\nfrom gate.cli.main import GC_THRESHOLDS",
        "gc.get_threshold() == before, gc.get_threshold() == GC_THRESHOLDS")
    assert seen == [["True", "False"], ["False", "True"]]
