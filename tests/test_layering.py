"""Data flows one way: a module imports only modules of earlier layers (ast-parsed, so imports
inside functions count too; imports under ``if TYPE_CHECKING:`` are type-only and exempt).

To add a module: put it in ORDER (core stages) or in PLACED_AFTER (everything else), naming the
entry it comes right after. A module in neither fails the test, so nobody adds a module without
deciding where it sits.
"""

from __future__ import annotations

import ast
import fnmatch
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
PACKAGE = ROOT / "gate"
EXAMPLES = ROOT / "examples"  # installed as gate.examples

#: The core stages, in data-flow order. ``statistics`` is a pure-numpy leaf (no gate imports)
#: and sits before ``design``, whose finish step reads the main pass's means.
ORDER: list[str] = [
    "errors",
    "statistics",
    "policy",
    "table",
    "design",
    "diagnostics",
    "passes",
    "judge",
    "verdict",
    "api",
    "artefacts",
    "artefacts.files",
    "artefacts.*",
    "artefacts.history",  # `gate history`: reads the audit log, its store, or verdicts
    "artefacts.history_html",  # history.html, its charts, the command
    "outputs",
    "examples",
    "examples.bike_share_demand",  # the invented demo data; other examples build on it
    "examples.*",
    "demo",
    "cli",
    "__init__",
    "__main__",
]

#: Modules outside the core stages, each placed right after an ORDER entry (same rank).
PLACED_AFTER: dict[str, str] = {
    "suggest": "api",  # remedies: reads diagnostics and verdicts, run by the CLI
    "segments": "passes",  # one pass, one mergeable Gram per segment key
    "structural": "passes",  # squares/products: reads a small sample; the verdict carries them
    "sklearn": "api",  # optional scikit-learn step: runs gate.api.check on fit
    "schemas": "outputs",  # JSON Schemas of the policy and verdict documents
    "policy_template": "outputs",  # `gate policy init`
    "diffing": "outputs",  # `gate diff`: compares verdict.json documents
    "progress": "passes",  # the progress line the passes report rows to (no gate imports)
    "engine_dask": "passes",  # the Dask engine: same passes on a cluster (optional extra)
    "bench": "__init__",  # `python -m gate.bench`: times `gate check` via the public API
}


def module_files() -> dict[str, Path]:
    files = {p.relative_to(PACKAGE).with_suffix("").as_posix().replace("/", "."): p
             for p in PACKAGE.rglob("*.py")}
    files = {name.removesuffix(".__init__") if name != "__init__" else name: path
             for name, path in files.items()}
    files.update({"examples" + ("" if p.stem == "__init__" else f".{p.stem}"): p
                  for p in EXAMPLES.glob("*.py")})
    return files


def rank_of(module: str) -> float:
    """Position in ORDER: exact names first, then globs; PLACED_AFTER shares its anchor's rank
    plus a half, so placed modules may import their anchor but not the next stage."""
    if module in ORDER:
        return float(ORDER.index(module))
    if module in PLACED_AFTER:
        return rank_of(PLACED_AFTER[module]) + 0.5
    for position, entry in enumerate(ORDER):
        if "*" in entry and fnmatch.fnmatchcase(module, entry):
            return float(position)
    raise KeyError(module)


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
    assert not unplaced, (f"modules without a layer: {unplaced}; add each to ORDER or "
                          "PLACED_AFTER in tests/test_layering.py")


def test_placement_table_names_real_anchors() -> None:
    for module, anchor in PLACED_AFTER.items():
        assert anchor in ORDER, (module, anchor)
        assert module not in ORDER


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
        if other >= own:
            bad.append(imported)
    assert not bad, f"gate.{module} imports later or same-layer modules: {bad}"


def test_the_checker_catches_a_backward_import(tmp_path: Path) -> None:
    # The test must be able to fail: a stage importing a later one is caught.
    fake = tmp_path / "design.py"
    fake.write_text("def f():\n    from gate.verdict import Verdict\n    return Verdict\n")
    assert gate_imports(fake, "design") == {"verdict"}
    assert rank_of("verdict") > rank_of("design")
    typed = tmp_path / "errors.py"
    typed.write_text("from typing import TYPE_CHECKING\nif TYPE_CHECKING:\n"
                     "    from gate.verdict import Verdict\n")
    assert gate_imports(typed, "errors") == set()
