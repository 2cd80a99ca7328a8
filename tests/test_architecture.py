"""The package's import graph: no circles between modules, no import inside a function
except the few listed below with the reason measured for each.

The graph is read from the source with ``ast`` (imports under ``if TYPE_CHECKING:``
count: a circle drawn only for the type checker is still a circle in the design). An
edge ``a -> b`` is an import of module ``b`` (or of a name from it) by module ``a``; the
package ``__init__`` a submodule import runs first is not an edge of its own.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parent.parent / "rescore"

# (module, function, imported module): why the import waits for the call
ALLOWED_INNER = {
    ("rescore.report.write", "render_all", "rescore.report.html"):
        "matplotlib: importing rescore.report.html costs about 830 ms (median of 5, "
        "-X importtime run after rescore.cli), paid only by the HTML report",
    ("rescore.cluster", "dask_client", "distributed"):
        "optional dependency (the 'cluster' extra): its absence is a usage error naming "
        "the extra, only when --cluster is given",
    ("rescore.cluster", "dask_client", "dask"):
        "optional dependency, as distributed above",
    # the package's names on first use (PEP 562): `import rescore.lm` took 0.20 s instead
    # of 0.45 s (medians of 5, this project's 2-core machine), the rest of the package
    # unloaded
    ("rescore", "__getattr__", "rescore.api"): "the API on first use, as above",
    ("rescore", "__getattr__", "rescore.weights"): "the weights file's model, as above",
    ("rescore", "__getattr__", "rescore.lm"): "NGramModel, as above",
    # `rescore lm ...` registers the language-model commands alone: `lm check --help` took
    # 0.44 s instead of 0.56 s (medians of 5), and `lm convert` of the 6.5 M n-gram ARPA
    # file of scripts/bench_lm_files.py 3.39 to 3.50 s instead of 3.55 to 3.69 s
    # (alternating runs)
    ("rescore.cli", "_register", "rescore.cli.commands"): "the other commands, as above",
    ("rescore.cli", "_register", "rescore.cli.report"): "the report command, as above",
}


def _module_name(path: Path) -> str:
    parts = path.relative_to(PACKAGE.parent).with_suffix("").parts
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def _packages() -> set[str]:
    return {_module_name(p) for p in PACKAGE.rglob("__init__.py")}


def _modules() -> dict[str, ast.Module]:
    return {_module_name(p): ast.parse(p.read_text(), str(p))
            for p in sorted(PACKAGE.rglob("*.py"))}


def _targets(node: ast.Import | ast.ImportFrom, here: str, packages: set[str],
             known: set[str]) -> set[str]:
    """The package modules an import statement loads."""
    if isinstance(node, ast.Import):
        return {a.name for a in node.names if a.name in known}
    base = node.module or ""
    if node.level:  # relative: from the package holding ``here``, ``level - 1`` up
        package = here.split(".") if here in packages else here.split(".")[:-1]
        package = package[:len(package) - node.level + 1]
        base = ".".join([*package, *([base] if base else [])])
    out = {f"{base}.{a.name}" if f"{base}.{a.name}" in known else base for a in node.names}
    return out & known


def _graph(modules: dict[str, ast.Module],
           packages: set[str] | None = None) -> dict[str, set[str]]:
    known = set(modules)
    packages = _packages() if packages is None else packages
    graph: dict[str, set[str]] = {m: set() for m in modules}
    for name, tree in modules.items():
        for node in ast.walk(tree):
            if isinstance(node, ast.Import | ast.ImportFrom):
                graph[name] |= _targets(node, name, packages, known) - {name}
    return graph


def _inner_imports(modules: dict[str, ast.Module]) -> set[tuple[str, str, str]]:
    found = set()
    for name, tree in modules.items():
        for fn in ast.walk(tree):
            if not isinstance(fn, ast.FunctionDef | ast.AsyncFunctionDef):
                continue
            for node in ast.walk(fn):
                if isinstance(node, ast.Import):
                    found |= {(name, fn.name, a.name) for a in node.names}
                elif isinstance(node, ast.ImportFrom):
                    found.add((name, fn.name, node.module or "."))
    return found


def _cycles(graph: dict[str, set[str]]) -> list[list[str]]:
    """Strongly connected components of more than one module (Tarjan's algorithm)."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on_stack: set[str] = set()
    out: list[list[str]] = []

    def visit(v: str) -> None:
        index[v] = low[v] = len(index)
        stack.append(v)
        on_stack.add(v)
        for w in sorted(graph[v]):
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on_stack:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            component = []
            while True:
                w = stack.pop()
                on_stack.discard(w)
                component.append(w)
                if w == v:
                    break
            if len(component) > 1:
                out.append(sorted(component))

    for v in sorted(graph):
        if v not in index:
            visit(v)
    return out


def test_the_checks_see_a_circle_and_an_inner_import() -> None:
    # the checks themselves, on a two-module circle and a function-level import written here
    a = ast.parse("from rescore.b import x\n")
    b = ast.parse("import rescore.a\n\ndef f():\n    import json\n")
    modules = {"rescore.a": a, "rescore.b": b}
    assert _cycles(_graph(modules, set())) == [["rescore.a", "rescore.b"]]
    relative = {"rescore.lm": ast.parse("from .vocab import V\n"), "rescore.lm.vocab":
                ast.parse("from . import x\nfrom ..errors import E\n"),
                "rescore.errors": ast.parse("")}
    assert _graph(relative, {"rescore.lm"}) == {"rescore.lm": {"rescore.lm.vocab"},
                                                "rescore.lm.vocab": {"rescore.lm",
                                                                     "rescore.errors"},
                                                "rescore.errors": set()}
    assert _inner_imports(modules) == {("rescore.b", "f", "json")}


def test_no_import_circle_between_modules() -> None:
    assert _cycles(_graph(_modules())) == []


def test_imports_inside_functions_only_where_listed_with_a_reason() -> None:
    assert _inner_imports(_modules()) <= set(ALLOWED_INNER)


@pytest.mark.parametrize("entry", sorted(ALLOWED_INNER))
def test_every_allowed_inner_import_is_still_there(entry: tuple[str, str, str]) -> None:
    # an entry whose import has gone would let a new one in under an old reason
    assert entry in _inner_imports(_modules())


def test_the_library_never_imports_the_command_line() -> None:
    graph = _graph(_modules())
    bad = {m: sorted(t for t in targets if t.startswith("rescore.cli"))
           for m, targets in graph.items()
           if not m.startswith("rescore.cli") and m != "rescore.__main__"}
    assert {m: t for m, t in bad.items() if t} == {}


# about 500 lines: the bound on a module (tune.py held 1,300 lines and seven jobs)
MAX_LINES = 520
# modules over the bound that another change splits, and which
LONG_FOR_NOW: dict[str, str] = {}


def test_no_module_much_over_500_lines() -> None:
    long = {str(p.relative_to(PACKAGE)): n for p in PACKAGE.rglob("*.py")
            if (n := len(p.read_text().splitlines())) > MAX_LINES
            and str(p.relative_to(PACKAGE)) not in LONG_FOR_NOW}
    assert long == {}


def test_lm_commands_load_the_language_model_code_alone() -> None:
    # the fast path above, in a real process: `rescore lm ...` leaves the N-best,
    # tuning and report code unloaded, and `import rescore` loads no API until it is used;
    # nor the scoring rules and the aligner (rescore.units is all the unit they need: 30 ms
    # of start-up, 0.41 s to 0.38 s for `lm convert` of a tiny file, medians of 5; pydantic
    # itself is loaded by typer, which coerces options through it)
    import subprocess
    import sys
    probe = ("import sys; sys.argv = ['rescore', '-q', 'lm', 'check', '--help']\n"
             "from rescore.cli import main\n"
             "try:\n    main()\nexcept SystemExit:\n    pass\n"
             "print(sorted(m for m in ('rescore.pipeline', 'rescore.tune', 'rescore.report',"
             " 'rescore.api', 'rescore.rules', 'rescore.align', 'rescore.counting', 'rapidfuzz')"
             " if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True,
                         check=True, cwd=PACKAGE.parent).stdout
    assert out.strip().splitlines()[-1] == "[]", out
    whole = subprocess.run([sys.executable, "-m", "rescore", "--help"], capture_output=True,
                           text=True, check=True, cwd=PACKAGE.parent).stdout
    assert all(c in whole for c in ("check", "tune", "apply", "report", "demo", "lm"))
