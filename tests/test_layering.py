"""Data flows one way: every import points down the pipeline (ast-parsed, so imports inside
functions count too; imports under ``if TYPE_CHECKING:`` are type-only and exempt), and the
module graph has no cycles.

The package is one folder per stage. A module's layer is its stage (the first part of its
dotted name); a module may import its own stage's modules and any earlier stage's, never a later
one's. There is no list of exceptions: a new stage folder must be placed in STAGES, and a new
module inside an existing folder is placed by its folder.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
PACKAGE = ROOT / "gate"
EXAMPLES = ROOT / "examples"  # installed as gate.examples

#: The stages in data-flow order; each entry is a top-level module or folder of ``gate/``.
STAGES: list[str] = [
    "errors",     # exception tree; imports nothing of gate at run time
    "preload",    # import modules on a thread beside GIL-free work (standard library only)
    "numerics",   # the only copy of each numerical kernel (pure numpy/scipy, no gate imports)
    "policy",     # policy models, the only YAML reader, the starter policy
    "read",       # table sources: files, folders, frames; provenance
    "design",     # policy columns -> design plan, encoded blocks, finished design
    "stats",      # streaming statistics: accumulators, exact-pass routing, engines
    "diagnose",   # statistics -> Diagnostics (arrays only)
    "judge",      # rules, waivers, findings, the Verdict and its document
    "remedies",   # structural terms, suggest's search (through the judge), policy editing
    "artefacts",  # writers: verdict.json, HTML, JUnit, audit log, matrices, terminal text
    "api",        # check(): the only place that knows the order of the stages
    "sklearn",    # optional scikit-learn step over the API
    "examples",   # the invented demo data (gate.examples)
    "cli",        # main(argv) -> int, one module per command group
    "bench",      # thin entry point to benchmarks/ (outside the package)
    "__init__",   # the front door: re-exports the public names
    "__main__",
]


def module_files() -> dict[str, Path]:
    files = {p.relative_to(PACKAGE).with_suffix("").as_posix().replace("/", "."): p
             for p in PACKAGE.rglob("*.py")}
    files = {name.removesuffix(".__init__") if name != "__init__" else name: path
             for name, path in files.items()}
    files.update({"examples" + ("" if p.stem == "__init__" else f".{p.stem}"): p
                  for p in EXAMPLES.glob("*.py")})
    return files


def rank_of(module: str) -> float:
    """Position of the module's stage in STAGES (the first part of its dotted name)."""
    stage = module.split(".")[0]
    if stage not in STAGES:
        raise KeyError(module)
    return float(STAGES.index(stage))


def _is_type_checking(node: ast.If) -> bool:
    test = node.test
    return (isinstance(test, ast.Name) and test.id == "TYPE_CHECKING") or (
        isinstance(test, ast.Attribute) and test.attr == "TYPE_CHECKING")


def gate_imports(path: Path, module: str) -> set[str]:
    """Modules of the gate package imported by a file (runtime imports only)."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    package_parts = module.split(".") if path.stem == "__init__" else module.split(".")[:-1]
    found: set[str] = set()

    def visit(node: ast.AST) -> None:
        if isinstance(node, ast.If) and _is_type_checking(node):
            for child in node.orelse:
                visit(child)
            return
        if isinstance(node, ast.Import):
            for alias in node.names:
                if alias.name == "gate" or alias.name.startswith("gate."):
                    found.add(alias.name.removeprefix("gate").lstrip(".") or "__init__")
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package_parts[: len(package_parts) - node.level + 1]
                target = ".".join(base + ([node.module] if node.module else []))
            elif node.module and (node.module == "gate" or node.module.startswith("gate.")):
                target = node.module.removeprefix("gate").lstrip(".")
            else:
                target = None
            if target is not None:
                if target == "":
                    # `from gate import x`: x may be a submodule or a name from __init__
                    for alias in node.names:
                        sub = alias.name
                        found.add(sub if sub in module_files() else "__init__")
                else:
                    found.add(target)
        for child in ast.iter_child_nodes(node):
            visit(child)

    visit(tree)
    found.discard(module)
    return found


ALL_MODULES = sorted(module_files())


def test_every_module_has_a_place() -> None:
    unplaced = []
    for module in ALL_MODULES:
        try:
            rank_of(module)
        except KeyError:
            unplaced.append(module)
    assert not unplaced, (f"modules without a stage: {unplaced}; add the folder to STAGES in "
                          "tests/test_layering.py")


def test_no_import_cycles() -> None:
    """Within a stage, modules may import each other, but never in a circle."""
    files = module_files()
    graph = {m: {i for i in gate_imports(files[m], m) if i in files} for m in files}
    state: dict[str, int] = {}  # 1 = on the current path, 2 = done

    def visit(node: str, path: list[str]) -> list[str] | None:
        state[node] = 1
        for nxt in sorted(graph[node]):
            if state.get(nxt) == 1:
                return path + [node, nxt]
            if nxt not in state:
                found = visit(nxt, path + [node])
                if found:
                    return found
        state[node] = 2
        return None

    for start in sorted(graph):
        if start not in state:
            cycle = visit(start, [])
            assert cycle is None, f"import cycle: {' -> '.join(cycle)}"


@pytest.mark.parametrize("module", ALL_MODULES)
def test_imports_only_earlier_layers(module: str) -> None:
    try:
        own = rank_of(module)
    except KeyError:
        pytest.fail(f"{module} has no layer (see test_every_module_has_a_place)")
    path = module_files()[module]
    bad = []
    for imported in sorted(gate_imports(path, module)):
        try:
            other = rank_of(imported)
        except KeyError:
            bad.append(f"{imported} (no layer)")
            continue
        if other > own:
            bad.append(imported)
    assert not bad, f"gate.{module} imports later or same-layer modules: {bad}"


def test_the_checker_catches_a_backward_import(tmp_path: Path) -> None:
    # The test must be able to fail: a stage importing a later one is caught.
    fake = tmp_path / "plan.py"
    fake.write_text("def f():\n    from gate.judge.verdict import Verdict\n    return Verdict\n")
    assert gate_imports(fake, "design.plan") == {"judge.verdict"}
    assert rank_of("judge.verdict") > rank_of("design.plan")
    typed = tmp_path / "errors.py"
    typed.write_text("from typing import TYPE_CHECKING\nif TYPE_CHECKING:\n"
                     "    from gate.judge.verdict import Verdict\n")
    assert gate_imports(typed, "errors") == set()
