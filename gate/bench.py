"""``python -m gate.bench``: a thin entry point; the benchmark itself lives outside the package,
in ``benchmarks/`` at the top of a source checkout (DEVELOPERS.md, "How to benchmark")."""

from __future__ import annotations

import sys
from pathlib import Path


def main(argv: list[str] | None = None) -> int:
    root = Path(__file__).resolve().parents[1]
    if (root / "benchmarks" / "run.py").is_file() and str(root) not in sys.path:
        sys.path.insert(0, str(root))
    try:
        from benchmarks.run import main as run  # type: ignore[import-not-found,unused-ignore]
    except ModuleNotFoundError:
        print("gate.bench: the benchmarks ship with a source checkout of collinearity-gate "
              "(folder benchmarks/); run this from a clone", file=sys.stderr)
        return 2
    result: int = run(argv)
    return result


if __name__ == "__main__":
    raise SystemExit(main())
