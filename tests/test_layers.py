"""The modules import one way: every driftscreen module imports only modules of a lower rank.

Imports are read from the source (``ast``), not by importing, so the test sees exactly what
a reader sees. Imports under ``if TYPE_CHECKING:`` serve annotations only and are not
counted. Inside a function, a driftscreen module may be imported only by the sanctioned
``summary()`` methods (as statsmodels does for its summaries); optional dependencies
(matplotlib, distributed, h5py) are imported where they are needed.
"""

from __future__ import annotations

import ast
from functools import cache
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parent.parent / "src" / "driftscreen"

#: Rank of every room, lowest first; a room is a module or a package of modules. This is
#: the table of DEVELOPERS.md ("Layers").
RANKS: dict[str, int] = {
    "version": 0, "errors": 0,
    "limits": 1, "files": 1, "seeds": 1, "fdr": 1, "progress": 1,
    "dataset": 2,
    "intake": 3,
    "neutral": 4,
    "niche": 5,
    "synthetic": 6,
    "statistics": 7,
    "taxon_scan": 8,
    "results": 9,
    "serialize": 10,
    "calibrate": 11,
    "influence": 12, "reanalysis": 12,
    "power": 13,
    "store": 14,
    "screen": 15,
    "notes": 16,
    "report": 17,
    "commands": 18,
    "demo": 19,
    "cli": 20,
    "calibration_study": 21,
    "__init__": 22,
}
#: Order of the modules inside a package (a module imports only earlier ones).
INSIDE = {
    "statistics": ["base", "composition", "pooling", "combination", "stationary_divergence",
                   "regrouping_invariance", "fluctuation_scaling", "dispersion_heterogeneity",
                   "registry", "__init__"],
    "neutral": ["model", "dirichlet", "lines_of_descent", "technical", "fit", "simulate",
                "wright_fisher",
                "__init__"],
    "intake": ["tables", "counts", "metadata", "abundance", "taxonomy", "biom", "reader",
               "writer", "__init__"],
    "report": ["format", "taxa", "text", "tables", "figures", "power", "__init__"],
}
#: Statistic modules: none imports another.
STATISTIC_MODULES = ("stationary_divergence", "regrouping_invariance", "fluctuation_scaling",
                     "dispersion_heterogeneity")
OPTIONAL = ("matplotlib", "distributed", "biom", "h5py")


def module_name(path: Path) -> str:
    parts = path.relative_to(PACKAGE).with_suffix("").parts
    return ".".join(parts)


@cache
def modules() -> tuple[Path, ...]:
    return tuple(sorted(PACKAGE.rglob("*.py")))


@cache
def known_modules() -> frozenset[str]:
    return frozenset(module_name(path) for path in modules())


def is_type_checking(node: ast.AST) -> bool:
    return isinstance(node, ast.If) and "TYPE_CHECKING" in ast.unparse(node.test)


def imported(node: ast.Import | ast.ImportFrom) -> list[str]:
    """The driftscreen modules an import statement names, without the package prefix."""
    known = known_modules()
    if isinstance(node, ast.Import):
        names = [alias.name for alias in node.names]
    else:
        base = node.module or ""
        names = [f"{base}.{alias.name}" if f"{base}.{alias.name}".removeprefix(
            "driftscreen.") in known else base for alias in node.names]
    found = []
    for name in names:
        if name == "driftscreen" or not name.startswith("driftscreen."):
            continue
        found.append(name.removeprefix("driftscreen."))
    return found


def module_level_imports(tree: ast.Module) -> list[ast.Import | ast.ImportFrom]:
    """Imports at module level, outside ``if TYPE_CHECKING:`` blocks."""
    found = []
    for node in tree.body:
        if is_type_checking(node):
            continue
        found += [n for n in ast.walk(node) if isinstance(n, (ast.Import, ast.ImportFrom))
                  and not isinstance(node, (ast.FunctionDef, ast.ClassDef))]
    return found


def room_of(name: str) -> str:
    return name.split(".")[0]


def position(name: str) -> tuple[int, int]:
    """(rank of the room, order inside its package)."""
    parts = name.split(".")
    inside = INSIDE.get(parts[0])
    order = inside.index(parts[1] if len(parts) > 1 else "__init__") if inside else 0
    return RANKS[parts[0]], order


@cache
def graph() -> dict[str, set[str]]:
    edges = {}
    for path in modules():
        tree = ast.parse(path.read_text(encoding="utf-8"))
        edges[module_name(path)] = {target for node in module_level_imports(tree)
                                    for target in imported(node)}
    return edges


def test_every_room_has_a_rank():
    rooms = {room_of(name) for name in graph()}
    assert rooms == set(RANKS)
    for package, order in INSIDE.items():
        assert {name.split(".")[1] for name in graph() if room_of(name) == package
                and "." in name} | {"__init__"} == set(order)


@pytest.mark.parametrize("name", sorted(graph()))
def test_imports_go_down_the_ranks(name):
    for target in graph()[name]:
        assert position(target) < position(name), f"{name} imports {target}"


def test_statistics_do_not_import_each_other():
    for name in STATISTIC_MODULES:
        targets = graph()[f"statistics.{name}"]
        assert not targets & {f"statistics.{other}" for other in STATISTIC_MODULES}, name


def test_no_import_cycle():
    edges, done, active = graph(), set(), []

    def visit(node: str) -> None:
        assert node not in active, " -> ".join(active + [node])
        if node in done:
            return
        active.append(node)
        for target in edges.get(node, ()):
            visit(target)
        active.pop()
        done.add(node)

    for node in edges:
        visit(node)


def function_level_imports(tree: ast.Module) -> list[tuple[str, ast.AST]]:
    """(enclosing function, import) for every import inside a function."""
    found = []
    for function in ast.walk(tree):
        if isinstance(function, (ast.FunctionDef, ast.AsyncFunctionDef)):
            found += [(function.name, node) for node in ast.walk(function)
                      if isinstance(node, (ast.Import, ast.ImportFrom))]
    return found


def test_only_summaries_import_inside_functions():
    for path in modules():
        tree = ast.parse(path.read_text(encoding="utf-8"))
        for function, node in function_level_imports(tree):
            names = ([alias.name for alias in node.names] if isinstance(node, ast.Import)
                     else [node.module or ""])
            for name in names:
                if name.split(".")[0] in OPTIONAL:
                    continue
                assert function == "summary", f"{module_name(path)}.{function} imports {name}"


def test_the_rank_test_sees_a_violation():
    """A lower layer importing a higher one is caught (the check can fail)."""
    tree = ast.parse("from driftscreen.report.text import number\n")
    [target] = imported(module_level_imports(tree)[0])
    assert position(target) > position("calibrate")
