"""The package's import graph follows the data flow: no module imports a later stage.

Stages, lowest first (a module may import its own stage and those below it):

    base        errors, fileio, version, linalg, configs_path, config_docs, metric_labels,
                reproducible, distributed, config_safety, resolvers, archive
    physics     systems, solvers, data, loading, lyapunov
    closures    closures
    hybrid      hybrid
    shared      forecasting, validity (what fitting and assessment share)
    fitting     fitting
    assess      assess
    export      export, simulator
    job         pipeline, rundir, run_index, sources, config_check, study, sweep: the modules that
                orchestrate, feed, check, list and summarise runs
    reading     explain (reads a fitted run's correction)
    command     cli, __main__, command_help

Every module of the package must be placed in this table, so a new module is placed on
purpose. The walk reads each file with :mod:`ast` (nothing is imported), including imports
inside functions: a lazy import for speed is fine, one that reaches upward is a cycle
worked around, and is reported.
"""

from __future__ import annotations

import ast
from pathlib import Path

import mnemode

PACKAGE = Path(mnemode.__file__).resolve().parent

STAGES = ["base", "physics", "closures", "hybrid", "shared", "fitting", "assess", "export", "job", "reading",
          "command"]

# first path component below mnemode/ (module or sub-package) -> stage
PLACES = {
    "__init__": "command",  # the public API re-exports from every stage
    "errors": "base", "fileio": "base", "version": "base", "linalg": "base", "configs_path": "base",
    "config_docs": "base", "metric_labels": "base", "reproducible": "base", "distributed": "base",
    "config_safety": "base", "resolvers": "base", "loading": "physics", "compiled": "physics",
    "export_aot": "export",
    "systems": "physics", "solvers": "physics", "data": "physics", "lyapunov": "physics",
    "closures": "closures",
    "hybrid": "hybrid",
    "forecasting": "shared", "validity": "shared",
    "fitting": "fitting",
    "assess": "assess",
    "export": "export", "simulator": "export", "archive": "base",
    "pipeline": "job", "rundir": "job", "run_index": "job", "sources": "job", "config_check": "job",
    "study": "job", "sweep": "job",
    "explain": "reading",
    "cli": "command", "__main__": "command", "command_help": "command",
}


def _modules():
    for path in sorted(PACKAGE.rglob("*.py")):
        rel = path.relative_to(PACKAGE).with_suffix("")
        yield path, rel.parts


def _place(parts: tuple[str, ...]) -> str | None:
    return PLACES.get(parts[0])


def _imported(tree: ast.AST, parts: tuple[str, ...]):
    """(line, first component below mnemode/) for every import of a mnemode module in ``tree``."""
    package = list(parts[:-1]) if parts[-1] != "__init__" else list(parts[:-1])
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom):
            if node.level:
                base = package[: len(package) - (node.level - 1)] if node.level > 1 else package
                target = base + (node.module.split(".") if node.module else [])
                if not target:  # "from . import x": x is the module
                    for alias in node.names:
                        yield node.lineno, alias.name
                    continue
                yield node.lineno, target[0]
            elif node.module and (node.module == "mnemode" or node.module.startswith("mnemode.")):
                rest = node.module.split(".")[1:]
                if rest:
                    yield node.lineno, rest[0]
                else:
                    for alias in node.names:
                        yield node.lineno, alias.name
        elif isinstance(node, ast.Import):
            for alias in node.names:
                if alias.name.startswith("mnemode."):
                    yield node.lineno, alias.name.split(".")[1]


def test_every_module_has_a_stage():
    unplaced = [".".join(parts) for _, parts in _modules() if parts[0] != "configs" and _place(parts) is None]
    assert not unplaced, f"place these modules in a stage of PLACES: {unplaced}"


def test_no_module_imports_a_later_stage():
    offences = []
    for path, parts in _modules():
        own = _place(parts)
        if own is None or parts[0] == "configs":
            continue
        tree = ast.parse(path.read_text(), filename=str(path))
        for line, target in _imported(tree, parts):
            if target in ("__version__",):
                offences.append(f"{'.'.join(parts)}:{line} imports the package root for the version")
                continue
            stage = PLACES.get(target)
            if stage is None:
                continue  # a name imported from the package root (only the command stage does that)
            if STAGES.index(stage) > STAGES.index(own):
                offences.append(f"{'.'.join(parts)}:{line} ({own}) imports {target} ({stage})")
    assert not offences, "imports against the stage order:\n" + "\n".join(offences)


def test_the_walk_sees_relative_and_lazy_imports():
    # the checker itself: a lazy upward import inside a function is found
    tree = ast.parse("def f():\n    from ..fitting.ridge import ridge_solve\n")
    assert list(_imported(tree, ("closures", "random_features"))) == [(2, "fitting")]
    tree = ast.parse("from . import errors\nfrom .hybrid import simulate\n")
    assert list(_imported(tree, ("pipeline",))) == [(1, "errors"), (2, "hybrid")]
