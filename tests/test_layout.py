"""The code's layout rules (DEVELOPERS.md, "Architecture"): no import cycles, counting imports inside
functions; small modules; long functions say why; the on-device command runs with torch unimportable."""
from __future__ import annotations

import ast
import subprocess
import sys
from pathlib import Path

from helpers import torch_shadowed_env

SRC = Path(__file__).resolve().parents[1] / "src"
PACKAGE = SRC / "tightfit"
MAX_MODULE_LINES = 310       # "no module over ~300 lines"
MAX_FUNCTION_LINES = 50      # longer ones carry a "# long: why" comment on the line above


def module_name(path: Path, root: Path = SRC) -> str:
    parts = list(path.relative_to(root).with_suffix("").parts)
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def import_graph(package: Path = PACKAGE) -> dict[str, set[str]]:
    """module -> the tightfit modules it imports anywhere in its file (top level or inside functions)."""
    root = package.parent
    modules = {module_name(p, root): p for p in package.rglob("*.py")}
    graph: dict[str, set[str]] = {m: set() for m in modules}
    for name, path in modules.items():
        here = name if path.name == "__init__.py" else name.rpartition(".")[0]
        for node in ast.walk(ast.parse(path.read_text())):
            targets: list[str] = []
            if isinstance(node, ast.Import):
                targets = [a.name for a in node.names]
            elif isinstance(node, ast.ImportFrom):
                base = node.module or ""
                if node.level:
                    up = here.split(".")[:len(here.split(".")) - node.level + 1]
                    base = ".".join(up + ([base] if base else []))
                targets = [f"{base}.{a.name}" if f"{base}.{a.name}" in modules else base for a in node.names]
            for t in targets:
                if t in modules and t != name and not modules[t].name == "__init__.py":
                    graph[name].add(t)
    return graph


def find_cycle(graph: dict[str, set[str]]) -> list[str] | None:
    """One import cycle as a path [a, b, ..., a], or None (depth-first search, three colours)."""
    colour, stack = dict.fromkeys(graph, 0), []

    def visit(m: str) -> list[str] | None:
        colour[m] = 1
        stack.append(m)
        for n in sorted(graph[m]):
            if colour[n] == 1:
                return stack[stack.index(n):] + [n]
            if colour[n] == 0 and (found := visit(n)):
                return found
        colour[m] = 2
        stack.pop()
        return None
    for m in sorted(graph):
        if colour[m] == 0 and (found := visit(m)):
            return found
    return None


def test_cycle_finder_finds_a_planted_cycle(tmp_path):
    # The finder itself must be able to fail: a package whose modules import each other inside functions.
    pkg = tmp_path / "tightfit"
    (pkg / "sub").mkdir(parents=True)
    (pkg / "__init__.py").write_text("")
    (pkg / "sub" / "__init__.py").write_text("")
    (pkg / "sub" / "a.py").write_text("def f():\n    from tightfit.sub import b\n")
    (pkg / "sub" / "b.py").write_text("from .c import x\n")
    (pkg / "sub" / "c.py").write_text("import tightfit.sub.a\nx = 1\n")
    assert find_cycle(import_graph(pkg)) == ["tightfit.sub.a", "tightfit.sub.b", "tightfit.sub.c", "tightfit.sub.a"]
    (pkg / "sub" / "c.py").write_text("x = 1\n")
    assert find_cycle(import_graph(pkg)) is None


def test_no_import_cycles():
    graph = import_graph()
    assert len(graph) > 40 and "tightfit.search.choose" in graph["tightfit.search.driver"]  # the graph is real
    assert find_cycle(graph) is None, f"import cycle: {' -> '.join(find_cycle(graph))}"


# The pipeline's floors, lowest first: a module imports from its own floor and the floors below it, never
# from one above (DEVELOPERS.md, "Architecture"). The base holds the shared tools and the device side
# (ondevice/ imports nothing of tightfit, see below). export/ sits below search/: a search ends by
# exporting its picks through the same path `tightfit cut` takes, and export/ never needs a search.
FLOORS = (
    ("tightfit", "tightfit.errors", "tightfit.progress", "tightfit.budgets", "tightfit.ondevice"),
    ("tightfit.model",),
    ("tightfit.recipe", "tightfit.recipe_tables", "tightfit.checkpoint", "tightfit.rundir"),
    ("tightfit.data",),
    ("tightfit.latency",),
    ("tightfit.train",),
    ("tightfit.export",),
    ("tightfit.search",),
    ("tightfit.report",),
    ("tightfit.recipe_reference", "tightfit.demo", "tightfit.cli", "tightfit.__main__"),
)


def floor_of(module: str, floors=FLOORS) -> int:
    """Index of the floor whose longest listed prefix names ``module`` (KeyError if none does)."""
    best = max(((len(p), i) for i, names in enumerate(floors) for p in names
                if module == p or module.startswith(p + ".")), default=None)
    if best is None:
        raise KeyError(f"{module} is on no floor: add it to FLOORS in tests/test_layout.py")
    return best[1]


def upward_imports(graph: dict[str, set[str]], floors=FLOORS) -> list[str]:
    """Every import of a module on a higher floor, as 'importer -> imported'."""
    return sorted(f"{m} -> {t}" for m, ts in graph.items() for t in ts if floor_of(t, floors) > floor_of(m, floors))


def test_order_finder_finds_a_planted_upward_import(tmp_path):
    # The check itself must be able to fail: model/ importing the recipe, lazily inside a function.
    pkg = tmp_path / "tightfit"
    (pkg / "model").mkdir(parents=True)
    for f in ("__init__.py", "model/__init__.py", "model/space.py", "errors.py"):
        (pkg / f).write_text("")
    (pkg / "recipe.py").write_text("from tightfit.model.space import x\nfrom tightfit import errors\n")
    (pkg / "model" / "net.py").write_text("def build():\n    from tightfit.recipe import Recipe\n")
    assert upward_imports(import_graph(pkg)) == ["tightfit.model.net -> tightfit.recipe"]
    (pkg / "model" / "net.py").write_text("def build():\n    from tightfit.model import space\n")
    assert upward_imports(import_graph(pkg)) == []


def test_imports_follow_the_pipeline_order():
    graph = import_graph()
    assert "tightfit.model.space" in graph["tightfit.recipe"]  # the graph is real
    assert not upward_imports(graph), "imports against the pipeline order:\n" + "\n".join(upward_imports(graph))


def test_ondevice_imports_nothing_of_tightfit_outside_itself():
    graph = import_graph()
    outside = {m: sorted(t for t in ts if not t.startswith("tightfit.ondevice")) for m, ts in graph.items()
               if m.startswith("tightfit.ondevice")}
    assert not any(outside.values()), outside


def test_modules_are_small_and_long_functions_say_why():
    for path in PACKAGE.rglob("*.py"):
        lines = path.read_text().splitlines()
        assert len(lines) <= MAX_MODULE_LINES, f"{path.relative_to(SRC)} has {len(lines)} lines: split it"
        for node in ast.walk(ast.parse("\n".join(lines))):
            if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)):
                first = min([node.lineno] + [d.lineno for d in node.decorator_list])
                if node.end_lineno - node.lineno + 1 > MAX_FUNCTION_LINES:
                    assert lines[first - 2].lstrip().startswith("# long:"), \
                        f"{path.relative_to(SRC)}:{node.lineno} {node.name} is long; split it or say why"


def test_tightfit_verify_cli_runs_with_torch_unimportable(tmp_path):
    # The documented device command, through the real CLI entry point (not the module's own main):
    # with torch unimportable it must reach verify's own input checks (exit 2, one error line).
    env, marker = torch_shadowed_env(tmp_path, str(SRC))  # checks that torch really is unimportable
    for argv in (["--help"], ["verify", "--help"], ["verify", str(tmp_path / "no-such-export")]):
        proc = subprocess.run([sys.executable, "-m", "tightfit", *argv], env=env, capture_output=True, text=True,
                              cwd=tmp_path)
        assert not marker.exists(), f"tightfit {' '.join(argv)} tried to import torch: {proc.stderr[-2000:]}"
        if argv[-1] == "--help":
            assert proc.returncode == 0 and "usage: tightfit" in proc.stdout
        else:
            assert proc.returncode == 2 and proc.stderr.startswith("error: export folder") and "not found" in proc.stderr


def test_progress_in_a_log_is_a_plain_line_every_few_seconds():
    # A redirected stream (CI log, `> log`) gets newline-terminated lines, no carriage-return redraws,
    # and a 160-step loop writes a handful of lines, not one frame per step (tqdm's own output otherwise).
    import io
    from tightfit.progress import bar
    log = io.StringIO()
    b = bar(total=160, desc="supernet", unit="step", stream=log)
    for _ in range(160):
        b.update(1)
    b.close()
    text = log.getvalue()
    assert "\r" not in text and text.endswith("\n")
    lines = text.splitlines()
    assert 1 <= len(lines) <= 3 and "160/160" in lines[-1]
