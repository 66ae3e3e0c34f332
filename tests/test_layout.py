"""The package layout: data flows one way through the stages (see DEVELOPERS.md).

Every import of our own code, at module level or inside a function, is read
with the standard library's ``ast`` and checked against the order of the
stages. A lower stage importing a higher one fails the test.
"""

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
PACKAGE = ROOT / "unmix"
PLUGIN = ROOT / "plugins" / "unmix_napari"

# Rank of each stage: a module may import only stages of lower or equal rank, and a sub-package
# never imports a sibling of the same rank (measure and optics stand side by side).
SHARED = {"errors", "_version", "_lazy", "_numba_cache", "threads"}  # used by all; import nothing of ours but each other
RANK = {"io": 1, "matrix": 2, "measure": 3, "optics": 3, "engine": 4, "coloc": 5, "report": 6, "demo": 7,
        "cli": 8, "unmix_napari": 8}
# Only these may import the report stage.
REPORT_USERS = {"report", "cli", "demo", "unmix_napari"}


def _stage_of_module(dotted: str) -> str:
    """'unmix.coloc.verdict' -> 'coloc'; 'unmix.matrix' -> 'matrix'; 'unmix' -> '' (the package itself)."""
    parts = dotted.split(".")
    if parts[0] == "unmix_napari":
        return "unmix_napari"
    return parts[1] if len(parts) > 1 else ""


def _module_name(path: Path) -> str:
    if path.is_relative_to(PLUGIN):
        rel = path.relative_to(PLUGIN.parent).with_suffix("")
    else:
        rel = path.relative_to(ROOT).with_suffix("")
    parts = list(rel.parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def _imports(path: Path) -> list[tuple[int, str]]:
    """(line, absolute module) of every import of our own code in `path`."""
    module = _module_name(path)
    package = module if path.name == "__init__.py" else module.rpartition(".")[0]
    found = []
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")
                base = base[: len(base) - (node.level - 1)]
                target = ".".join(base + ([node.module] if node.module else []))
            else:
                target = node.module or ""
            if node.module is None or (node.level and not node.module):
                # "from . import x": each name is a module of that package
                found += [(node.lineno, f"{target}.{alias.name}") for alias in node.names]
            else:
                found.append((node.lineno, target))
        elif isinstance(node, ast.Import):
            found += [(node.lineno, alias.name) for alias in node.names]
        elif (isinstance(node, ast.Call) and getattr(node.func, "id", "") == "lazy_exports"
              and isinstance(node.args[1], ast.Dict)):
            # lazy package exports name their modules as strings
            found += [(node.lineno, f"{package}.{value.value}") for value in node.args[1].values]
    return [(line, target) for line, target in found if target.split(".")[0] in ("unmix", "unmix_napari")]


def _sources():
    return sorted(PACKAGE.rglob("*.py")) + sorted(PLUGIN.rglob("*.py"))


def _violation(importer: str, imported: str) -> str | None:
    a, b = _stage_of_module(importer), _stage_of_module(imported)
    if a == "" or b == "":  # the package's own lazy API may name any stage; nothing imports the package itself
        return None if a == "" else f"{importer} imports the top-level package; import the module instead"
    if a == b:
        return None
    if a in SHARED:
        return None if b in SHARED else f"shared module {importer} imports the stage {b}"
    if b in SHARED:
        return None
    if b == "report" and a not in REPORT_USERS:
        return f"{importer} imports the report stage (only the command line, the demo and the plugin may)"
    if RANK[b] > RANK[a]:
        return f"{importer} (stage {a}) imports {imported} (higher stage {b})"
    if RANK[b] == RANK[a]:
        return f"{importer} (stage {a}) imports {imported} (sibling stage {b})"
    return None


def test_every_stage_has_a_known_rank():
    stages = {p.name for p in PACKAGE.iterdir() if p.is_dir() and (p / "__init__.py").exists()}
    modules = {p.stem for p in PACKAGE.glob("*.py") if p.stem != "__init__"}
    assert stages - RANK.keys() == set(), "a new sub-package needs its place in RANK (and in DEVELOPERS.md)"
    assert modules - RANK.keys() - SHARED == set(), "a new top-level module needs its place in RANK or SHARED"


def test_imports_point_one_way():
    problems = []
    for path in _sources():
        importer = _module_name(path)
        for line, imported in _imports(path):
            problem = _violation(importer, imported)
            if problem:
                problems.append(f"{path.relative_to(ROOT)}:{line}: {problem}")
    assert problems == []


def test_io_imports_nothing_of_ours_but_the_error_types():
    for path in (PACKAGE / "io").rglob("*.py"):
        for line, imported in _imports(path):
            assert imported.startswith(("unmix.io", "unmix.errors", "unmix._version", "unmix._lazy")), \
                f"{path.relative_to(ROOT)}:{line} imports {imported}"


@pytest.mark.parametrize("importer, imported, bad", [
    ("unmix.io.images", "unmix.coloc.verdict", True),
    ("unmix.measure.controls", "unmix.optics.prediction", True),
    ("unmix.coloc.verdict", "unmix.report.plots", True),
    ("unmix.engine.batch", "unmix.measure.levels", False),
    ("unmix.cli.report", "unmix.report.html", False),
    ("unmix_napari.overlap_widget", "unmix.report.plots", False),
])
def test_the_rule_itself(importer, imported, bad):
    # The checker must catch a violation, not merely find none (common practice: test the test).
    assert (_violation(importer, imported) is not None) is bad


def test_the_parser_imports_no_heavy_library():
    # `unmix --help` and every one-line error must start fast: the subcommands import their
    # libraries when they run, not when the parser is built (start-up ratio in bench_apply.py).
    import subprocess
    import sys

    heavy = ("numba", "scipy", "dask", "tifffile", "matplotlib", "zarr", "skimage")
    code = ("import sys; from unmix.cli.main import build_parser; build_parser(); "
            f"print(','.join(m for m in {heavy!r} if m in sys.modules))")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert done.stdout.strip() == ""
