"""The package's import graph follows the layout of shared/STYLE.md section 1 (read with ast, nothing imported).

Wings: base (errors, records, config, checks, information, forked, __init__, __main__) <- train <- sweep <- cli and
base <- fitting <- reporting <- cli; the Python API (api) stands on the top floor beside cli. sweep may also use fitting (the adaptive schedule fits between
rounds; fitting is torch-free, so no circle and no torch enters through it). Nothing imports cli;
fitting and reporting never reach torch or train; fitting never reaches matplotlib.
"""
from __future__ import annotations

import ast
from pathlib import Path

import pytest

PKG = Path(__file__).resolve().parents[1] / "depthplan"
BASE = {"errors", "records", "fit_record", "urls", "config", "checks", "information", "forked", "__init__"}
ALLOWED = {            # wing -> wings it may import (besides itself)
    "base": {"base"},
    "train": {"base"},
    "sweep": {"base", "train", "fitting"},
    "fitting": {"base"},
    "reporting": {"base", "fitting"},
    "cli": {"base", "train", "sweep", "fitting", "reporting"},
}


def _module_name(path: Path, pkg: Path = PKG) -> str:
    parts = path.relative_to(pkg.parent).with_suffix("").parts
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def _wing(module: str) -> str:
    parts = module.split(".")
    if len(parts) == 1:
        return "base"
    if parts[1] in BASE:
        return "base"
    return "cli" if parts[1] in {"cli", "__main__", "api"} else parts[1]   # the two front doors


def _imports(path: Path, pkg: Path = PKG) -> set[str]:
    """Every module `path` imports (absolute names), top level and inside functions."""
    module = _module_name(path, pkg)
    package = module if path.name == "__init__.py" else module.rsplit(".", 1)[0]
    out: set[str] = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            out.update(a.name for a in node.names)
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")[: len(package.split(".")) - node.level + 1]
                name = ".".join(base + ([node.module] if node.module else []))
            else:
                name = node.module or ""
            if node.module is not None:
                out.add(name)
            if node.module is None or node.level:     # `from . import figures`: a submodule
                out.update(f"{name}.{a.name}" for a in node.names)
    return out


def _graph() -> dict[str, set[str]]:
    mods = {_module_name(p): p for p in PKG.rglob("*.py")}
    graph = {}
    for name, path in mods.items():
        graph[name] = {m for m in _imports(path) if m in mods and m != name}
        graph[name] |= {"outside:" + m.split(".")[0] for m in _imports(path) if not m.startswith("depthplan")}
    return graph


def _closure(graph: dict[str, set[str]], start: str) -> set[str]:
    seen, todo = set(), [start]
    while todo:
        m = todo.pop()
        for n in graph.get(m, ()):
            if n not in seen:
                seen.add(n)
                todo.append(n)
    return seen


GRAPH = _graph()


def test_graph_was_read():
    # A walk that found nothing would pass every check below.
    assert {"depthplan.train.loop", "depthplan.fitting.assemble", "depthplan.reporting.write",
            "depthplan.sweep.run", "depthplan.cli"} <= set(GRAPH)
    assert "depthplan.fitting.estimators" in GRAPH["depthplan.fitting.depthlaw"]


@pytest.mark.parametrize("module", sorted(GRAPH))
def test_imports_point_one_way(module):
    wing = _wing(module)
    wrong = sorted(m for m in GRAPH[module] if not m.startswith("outside:")
                   and _wing(m) not in ALLOWED[wing] | {wing})
    assert not wrong, f"{module} ({wing}) imports {wrong} against the layout"


def test_no_import_circles():
    inside = {m: {n for n in deps if not n.startswith("outside:")} for m, deps in GRAPH.items()}
    # a package's __init__ re-exporting its own modules is not a circle through them
    circles = [m for m in inside if m in _closure({k: {n for n in v if not m.startswith(n + ".")}
                                                   for k, v in inside.items()}, m)]
    assert not circles, f"import circles through {circles}"


@pytest.mark.parametrize("module", sorted(m for m in GRAPH if _wing(m) in {"fitting", "reporting"}))
def test_fit_and_report_never_reach_torch(module):
    reached = _closure(GRAPH, module) | GRAPH[module]
    assert "outside:torch" not in reached, f"{module} reaches torch"
    assert not any(_wing(m) == "train" for m in reached if not m.startswith("outside:"))


@pytest.mark.parametrize("module", sorted(m for m in GRAPH if _wing(m) == "fitting") + ["depthplan"])
def test_fitting_never_reaches_matplotlib(module):
    reached = _closure(GRAPH, module) | GRAPH[module]
    assert "outside:matplotlib" not in reached, f"{module} reaches matplotlib"


def test_nothing_imports_cli():
    users = sorted(m for m, deps in GRAPH.items() if "depthplan.cli" in deps and _wing(m) != "cli")
    assert not users


def test_checker_catches_a_wrong_import(tmp_path):
    # The checker itself: a fitting module importing the trainer is reported.
    fake = PKG / "fitting" / "assemble.py"
    src = fake.read_text(encoding="utf-8") + "\nfrom ..train import loop\n"
    copy = tmp_path / "depthplan" / "fitting"
    copy.mkdir(parents=True)
    (copy / "assemble.py").write_text(src, encoding="utf-8")
    deps = _imports(copy / "assemble.py", tmp_path / "depthplan")
    assert "depthplan.train.loop" in deps and _wing("depthplan.train.loop") not in ALLOWED["fitting"]
