"""The shape of the code: one-way imports, one home per fact, one set of options.

These tests read the package's source (ast), not its behaviour; the behaviour they protect
is tested beside the code it lives in.
"""

from __future__ import annotations

import ast
import functools
import re
from pathlib import Path

import pytest
import workbench.models
from workbench.models import ParameterError, make_model

import workbench
from workbench import api
from workbench.cli import build_parser
from workbench.io.runfolder import COMPARISON_FILES, FILES
from workbench.options import FIT_OPTIONS, FitSettings

PACKAGE = Path(workbench.__file__).resolve().parent
MODELS = Path(workbench.models.__file__).resolve().parent

#: the stages, bottom first: a module may import only from its own stage or a lower one
LAYERS = [
    {"workbench.models"},
    {"workbench._layer", "workbench.options", "workbench.cautions", "workbench.progress"},
    {"workbench.io"},
    {"workbench.analysis"},
    {"workbench.figures"},
    {"workbench.report"},
    {"workbench.results"},
    {"workbench.pipeline", "workbench.steps"},
    {"workbench.api"},
    {"workbench.cli"},
    {"workbench"},
]


def _modules() -> dict[str, Path]:
    out = {}
    for root, prefix in ((PACKAGE, "workbench"), (MODELS, "workbench.models")):
        for path in root.rglob("*.py"):
            rel = path.relative_to(root).with_suffix("")
            parts = [p for p in rel.parts if p != "__init__"]
            if prefix == "workbench" and parts[:1] == ["models"]:
                continue  # an installed wheel's copy of the model layer
            out[".".join([prefix, *parts])] = path
    return out


def _imports(name: str, path: Path, known: set[str]) -> set[str]:
    """Modules of the package that ``name`` imports anywhere in its source."""
    is_package = path.name == "__init__.py"
    here = name.split(".") if is_package else name.split(".")[:-1]
    found = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            targets = [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            base = here[: len(here) - node.level + 1] if node.level else []
            module = ".".join(base + ([node.module] if node.module else []))
            targets = [module] + [f"{module}.{a.name}" for a in node.names]
        else:
            continue
        for t in targets:
            while t and t not in known:
                t = t.rpartition(".")[0]
            if t and t != name:
                found.add(t)
    return found


def _graph() -> dict[str, set[str]]:
    modules = _modules()
    known = set(modules)
    return {name: _imports(name, path, known) for name, path in modules.items()}


def _layer(name: str) -> int:
    best = None
    for i, stage in enumerate(LAYERS):
        for prefix in stage:
            if (name == prefix or name.startswith(prefix + ".")) and (
                best is None or len(prefix) > best[1]
            ):
                best = (i, len(prefix))
    assert best is not None, f"{name} is in no stage of LAYERS"
    return best[0]


def test_no_import_cycle_among_the_package_modules():
    graph = _graph()
    state: dict[str, int] = {}
    stack: list[str] = []

    def visit(node: str) -> None:
        state[node] = 1
        stack.append(node)
        for nxt in sorted(graph.get(node, ())):
            if nxt == "workbench" or node.startswith(nxt + "."):
                continue  # a module may name its own package (re-exports sit above it)
            if state.get(nxt) == 1:
                cycle = stack[stack.index(nxt):] + [nxt]
                pytest.fail("import cycle: " + " -> ".join(cycle))
            if state.get(nxt) is None:
                visit(nxt)
        stack.pop()
        state[node] = 2

    for node in sorted(graph):
        if state.get(node) is None:
            visit(node)


def test_imports_only_point_down_the_stages():
    wrong = []
    for name, targets in _graph().items():
        for t in targets:
            if t == "workbench" or name.startswith(t + "."):
                continue
            if _layer(t) > _layer(name):
                wrong.append(f"{name} imports {t}")
    assert not wrong, "; ".join(sorted(wrong))


@functools.cache
def _code_strings(path: Path) -> tuple[str, ...]:
    """String constants of a module's code, docstrings left out (prose may name files).

    Cached: the file-name test asks for every module once per file name."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    docs = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Module | ast.ClassDef | ast.FunctionDef | ast.AsyncFunctionDef):
            body = node.body
            if body and isinstance(body[0], ast.Expr) and isinstance(body[0].value, ast.Constant):
                docs.add(id(body[0].value))
    return tuple(
        n.value for n in ast.walk(tree)
        if isinstance(n, ast.Constant) and isinstance(n.value, str) and id(n) not in docs
    )


@pytest.mark.parametrize("filename", sorted(
    n for n in [*FILES.values(), *COMPARISON_FILES.values()] if "." in n.strip(".")))
def test_each_run_folder_file_name_lives_in_one_module(filename):
    pattern = re.compile(r"(?<![\w-])" + re.escape(filename) + r"(?!\w)")
    homes = sorted(
        name for name, path in _modules().items()
        if any(pattern.search(s) for s in _code_strings(path))
    )
    assert homes == ["workbench.io.runfolder"], homes


def _fit_flags() -> set[str]:
    parser = build_parser()
    fit = parser._subparsers._group_actions[0].choices["fit"]
    dests = {a.dest for a in fit._actions if a.option_strings and a.dest != "help"}
    return dests


def test_fit_options_api_keywords_and_settings_keys_are_one_set():
    import inspect

    keywords = {p for p in inspect.signature(api.fit).parameters if p != "source"}
    settings = set(FitSettings.from_options().record())
    # --quiet only changes the terminal display, so it is the one flag not recorded
    assert _fit_flags() - {"quiet"} == keywords == settings == set(FIT_OPTIONS)
    # and the docstring lists every one of them (numpydoc)
    for name in FIT_OPTIONS:
        assert re.search(rf"^{name} : ", api.fit.__doc__, flags=re.MULTILINE), name


def test_unknown_options_are_refused_with_the_known_ones():
    with pytest.raises(ParameterError, match="'drws'.*known ones are: .*draws"):
        api.fit(api.demo_data_path(), drws=10)
    with pytest.raises(ParameterError, match="takes no setting 'drws'; it takes: .*draws"):
        make_model("beta-binomial", drws=10)
    with pytest.raises(ParameterError, match="takes no setting 'sigma_prior'"):
        make_model("beta-binomial", sigma_prior=1.0)


def test_modules_and_functions_stay_small():
    # DEVELOPERS.md: no module over ~600 lines, no function over ~80
    long_modules, long_functions = [], []
    for name, path in _modules().items():
        text = path.read_text(encoding="utf-8")
        if text.count("\n") > 650:
            long_modules.append(f"{name} ({text.count(chr(10))} lines)")
        for node in ast.walk(ast.parse(text)):
            if isinstance(node, ast.FunctionDef | ast.AsyncFunctionDef):
                size = node.end_lineno - node.lineno + 1
                if size > 100:
                    long_functions.append(f"{name}.{node.name} ({size} lines)")
    assert not long_modules, long_modules
    assert not long_functions, long_functions
