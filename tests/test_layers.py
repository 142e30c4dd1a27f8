"""The house rules of the package, checked on its source.

Data flows one way: each stage of the package may import only the stages before it
(DEVELOPERS.md, "The map"). Names that start with an underscore stay inside their stage.
Modules stay readable: none over 800 lines without a docstring line saying why, no function
over 120 lines.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
PKG = ROOT / "xtalkcal"

# The flow, first to last. A module may import its own stage and the stages before it.
STAGES = ["exceptions", "common", "hardware", "measure", "fits", "calibrate", "store",
          "compensation", "drift", "verification", "outputs", "campaign", "cli"]
MAX_MODULE_LINES = 800
MAX_FUNCTION_LINES = 120

SOURCES = sorted(p for p in PKG.rglob("*.py"))
DEVICE_SOURCES = sorted((ROOT / "simulated_device").rglob("*.py"))


def _module_name(path: Path) -> str:
    rel = path.relative_to(ROOT).with_suffix("")
    parts = list(rel.parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def _stage(module: str) -> int | None:
    """Index of a module's stage in the flow; None for the top-level package itself."""
    parts = module.split(".")
    if parts[0] != "xtalkcal" or len(parts) == 1:
        return None
    return STAGES.index(parts[1])


def _imports(tree: ast.Module, module: str) -> list[tuple[str, list[str], int]]:
    """Every import in a file, wherever it stands: (module, names, line)."""
    out = []
    package = module if module.count(".") < 2 or module.endswith("__init__") else module
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            out += [(a.name, [], node.lineno) for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            if node.level:  # relative: resolve against the importing module's package
                base = package.split(".")[: -node.level]
                target = ".".join(base + ([node.module] if node.module else []))
            else:
                target = node.module or ""
            out.append((target, [a.name for a in node.names], node.lineno))
    return out


def test_every_module_belongs_to_a_stage() -> None:
    for path in SOURCES:
        module = _module_name(path)
        if module != "xtalkcal":
            assert _stage(module) is not None, module


@pytest.mark.parametrize("path", SOURCES, ids=lambda p: str(p.relative_to(ROOT)))
def test_no_import_from_a_later_stage(path: Path) -> None:
    module = _module_name(path)
    own = _stage(module)
    if own is None:
        return  # the top-level package re-exports the public API of every stage
    tree = ast.parse(path.read_text(encoding="utf-8"))
    for target, names, line in _imports(tree, module):
        if target.split(".")[0] == "simulated_device" and _stage(module) != STAGES.index("cli"):
            # Only the command line picks the bundled simulator as its default rig.
            pytest.fail(f"{module}:{line} imports the simulator")
        if not target.startswith("xtalkcal"):
            continue
        assert target != "xtalkcal" or names == [], (
            f"{module}:{line} imports from the top-level package; import from the stage")
        stage = _stage(target)
        assert stage is not None and stage <= own, (
            f"{module}:{line} imports {target}, a later stage ({STAGES[stage]} after "
            f"{STAGES[own]})")
        if stage != own:
            private = [n for n in names if n.startswith("_") and n != "__version__"]
            assert not private, f"{module}:{line} takes private {private} from {target}"
        elif "." in module.removeprefix("xtalkcal.") and target.count(".") == 1:
            pytest.fail(f"{module}:{line} imports its own sub-package's __init__; import the "
                        "module that defines the name (avoids import cycles)")


def test_module_imports_have_no_cycles() -> None:
    graph: dict[str, set[str]] = {}
    for path in SOURCES:
        module = _module_name(path)
        tree = ast.parse(path.read_text(encoding="utf-8"))
        deps = set()
        for node in tree.body:  # run-time imports at module level
            if isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
                deps.add(node.module)
            elif isinstance(node, ast.Import):
                deps |= {a.name for a in node.names}
        graph[module] = {d for d in deps if d.startswith("xtalkcal.") and d != module}
    seen: dict[str, int] = {}

    def visit(m: str, trail: tuple[str, ...]) -> None:
        if seen.get(m) == 2:
            return
        assert seen.get(m) != 1, "import cycle: " + " -> ".join(trail + (m,))
        seen[m] = 1
        for d in sorted(graph.get(m, ())):
            visit(d, trail + (m,))
        seen[m] = 2

    for m in sorted(graph):
        visit(m, ())


@pytest.mark.parametrize("path", DEVICE_SOURCES, ids=lambda p: str(p.relative_to(ROOT)))
def test_simulated_device_sees_only_the_hardware_interface(path: Path) -> None:
    # The simulator stands where a lab's rig stands: it may know the chip, timelines, the
    # rig protocol and the safety check, and nothing the calibration builds on top of them.
    tree = ast.parse(path.read_text(encoding="utf-8"))
    for target, _names, line in _imports(tree, _module_name(path)):
        if target.startswith("xtalkcal"):
            stage = _stage(target)
            assert stage is not None and stage <= STAGES.index("hardware"), (
                f"{path.name}:{line} imports {target}")


@pytest.mark.parametrize("path", SOURCES + DEVICE_SOURCES, ids=lambda p: str(p.relative_to(ROOT)))
def test_modules_and_functions_stay_readable(path: Path) -> None:
    text = path.read_text(encoding="utf-8")
    tree = ast.parse(text)
    lines = text.count("\n") + 1
    if lines > MAX_MODULE_LINES:
        doc = ast.get_docstring(tree) or ""
        assert "lines because" in doc, (
            f"{path.name} has {lines} lines; split it, or say in its docstring why it is one "
            "module ('... lines because ...')")
    for node in ast.walk(tree):
        if isinstance(node, ast.FunctionDef | ast.AsyncFunctionDef):
            n = node.end_lineno - node.lineno + 1
            assert n <= MAX_FUNCTION_LINES, f"{path.name}:{node.lineno} {node.name} has {n} lines"
