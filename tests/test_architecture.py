"""The house rules of the code, checked by reading the source (Python's ast module).

- no module of the library opens a path except those of the ``terrain/io/`` package;
- no library message names a command-line flag (the CLI maps parameters to flags);
- no module imports a private name from another;
- the import graph of ``terrain`` and ``cli`` has no cycle;
- no function in ``terrain/`` is longer than 60 lines (its docstring not
  counted), except compiled (numba) kernels, and each of those says in a
  docstring what it computes;
- every option of every command has help text;
- none of the arrows the guide forbids (runner -> jobs, summary -> engine,
  outputs -> jobs or sweep, guard -> outputs, engine -> io, whole-grid engine
  -> blocked engine, jobs -> runner, io -> jobs, core -> io) exists;
- scratch and checkpoint file names (``.npy``, ``.npz``, ``.zarr``) are made in
  ``terrain/io/`` only;
- no module is longer than 800 lines, except kernel modules (mostly numba);
- a private module (``_name``) is imported only inside its own package;
- the run's layout (blocked or whole, its block side, on disk or in memory) is
  decided in ``terrain/layout.py`` only: no other module reads the default
  block side, asks a DEM whether it is on disk, or compares a grid's size
  with a block (the engines cut the blocks they are given).
"""

from __future__ import annotations

import ast
import functools
import re
from pathlib import Path

import click
import pytest

ROOT = Path(__file__).resolve().parents[1]
LIB = sorted((ROOT / "terrain").rglob("*.py"))
CLI = sorted((ROOT / "cli").glob("*.py"))
OPENERS = {"open", "rasterio.open", "np.load", "np.save", "np.savez", "savefig", "to_file",
           "to_csv", "read_text", "write_text", "read_bytes", "write_bytes", "read_dataframe",
           "read_csv", "mkstemp", "unlink", "replace", "mkdir", "iterdir", "fsync"}


@functools.cache  # parsed once per test process; the tests only read the trees
def _tree(path: Path) -> ast.Module:
    return ast.parse(path.read_text(), filename=str(path))


def _call_name(node: ast.Call) -> str:
    f = node.func
    parts = []
    while isinstance(f, ast.Attribute):
        parts.append(f.attr)
        f = f.value
    if isinstance(f, ast.Name):
        parts.append(f.id)
    return ".".join(reversed(parts))


def _module(path: Path) -> str:
    rel = path.relative_to(ROOT).with_suffix("")
    parts = list(rel.parts)
    if parts[0] == "cli":
        parts[0] = "cairn_cli"
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


IO = ROOT / "terrain" / "io"


@pytest.mark.parametrize("path", [p for p in LIB if p.parent != IO], ids=lambda p: p.name)
def test_only_io_opens_paths(path):
    bad = []
    for node in ast.walk(_tree(path)):
        if isinstance(node, ast.Call):
            name = _call_name(node)
            last = name.rsplit(".", 1)[-1]
            if name in OPENERS or (last in OPENERS and last not in ("replace",)):
                bad.append(f"{path.name}:{node.lineno} {name}()")
            if last == "replace" and name.startswith("os."):
                bad.append(f"{path.name}:{node.lineno} {name}()")
    assert not bad, bad


FLAG = re.compile(r"(?<![\w-])--[a-z][a-z0-9-]+")


@pytest.mark.parametrize("path", LIB, ids=lambda p: str(p.relative_to(ROOT)))
def test_library_messages_name_no_flags(path):
    bad = []
    for node in ast.walk(_tree(path)):
        if isinstance(node, ast.Constant) and isinstance(node.value, str):
            if FLAG.search(node.value) and not node.value.lstrip().startswith(("-----", ">>>")):
                # docstrings may describe the command line; messages may not
                bad.append((node.lineno, node.value[:60]))
    docs = {n.body[0].value.lineno for n in ast.walk(_tree(path))
            if isinstance(n, (ast.Module, ast.FunctionDef, ast.ClassDef)) and n.body
            and isinstance(n.body[0], ast.Expr) and isinstance(n.body[0].value, ast.Constant)}
    bad = [b for b in bad if b[0] not in docs]
    assert not bad, bad


@pytest.mark.parametrize("path", LIB + CLI, ids=lambda p: str(p.relative_to(ROOT)))
def test_no_private_name_crosses_modules(path):
    bad = []
    for node in ast.walk(_tree(path)):
        if isinstance(node, ast.ImportFrom):
            for alias in node.names:
                if alias.name.startswith("_") and not alias.name.startswith("__"):
                    bad.append(f"{path.name}:{node.lineno} {node.module}.{alias.name}")
    assert not bad, bad


def _imports(path: Path, known: set[str]) -> set[str]:
    mod = _module(path)
    package = mod if path.name == "__init__.py" else mod.rsplit(".", 1)[0]
    out = set()
    for node in ast.walk(_tree(path)):
        if isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")
                base = base[: len(base) - node.level + 1]
                target = ".".join(base + ([node.module] if node.module else []))
            else:
                target = node.module or ""
            cands = [target] + [f"{target}.{a.name}" for a in node.names]
        elif isinstance(node, ast.Import):
            cands = [a.name for a in node.names]
        else:
            continue
        for c in cands:
            while c and c not in known:
                c = c.rpartition(".")[0]
            if c and c != mod:
                out.add(c)
    return out


def test_import_graph_has_no_cycle():
    files = {_module(p): p for p in LIB + CLI}
    graph = {m: _imports(p, set(files)) for m, p in files.items()}
    # a package's __init__ re-exporting its submodules is not a cycle of files
    for m in graph:
        graph[m] = {t for t in graph[m] if not (m.startswith(t + ".") and files[t].name == "__init__.py")}
    state: dict[str, int] = {}

    def visit(m, stack):
        state[m] = 1
        for t in graph[m]:
            if state.get(t) == 1:
                raise AssertionError(" -> ".join(stack[stack.index(t):] + [t]))
            if t not in state:
                visit(t, stack + [t])
        state[m] = 2

    for m in sorted(graph):
        if m not in state:
            visit(m, [m])


def _is_compiled(fn: ast.FunctionDef) -> bool:
    for d in fn.decorator_list:
        target = d.func if isinstance(d, ast.Call) else d
        if _call_name(ast.Call(func=target, args=[], keywords=[])) in ("njit", "numba.njit"):
            return True
    return False


@pytest.mark.parametrize("path", LIB, ids=lambda p: str(p.relative_to(ROOT)))
def test_functions_are_short_or_documented_kernels(path):
    bad = []
    for node in ast.walk(_tree(path)):
        if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)):
            length = node.end_lineno - node.lineno + 1
            doc = node.body[0] if ast.get_docstring(node) is not None else None
            if doc is not None:  # the docstring is not code
                length -= doc.end_lineno - doc.lineno + 1
            if _is_compiled(node):
                if ast.get_docstring(node) is None:
                    bad.append(f"{node.name}: compiled kernel without a docstring")
            elif length > 60:
                bad.append(f"{node.name}: {length} lines")
    assert not bad, bad


def _commands():
    from cairn_cli.main import cli

    yield "cairn", cli
    yield from cli.commands.items()


@pytest.mark.parametrize("name,cmd", list(_commands()), ids=lambda x: x if isinstance(x, str) else "")
def test_every_option_has_help(name, cmd):
    missing = [p.name for p in cmd.params if isinstance(p, click.Option) and not p.help]
    assert not missing, f"{name}: options without help: {missing}"


# -- the parts and the arrows that must never exist (shared/GUIDE.md, section 1) -----------------
CORE = ("terrain.dem", "terrain.outlets", "terrain.errors", "terrain.layers", "terrain.defaults",
        "terrain.layout", "terrain.pairlog")
WHOLE_GRID_ENGINE = ("terrain.engine.persistence", "terrain.engine.basins", "terrain.engine.grid",
                     "terrain.engine.hydro")
NEVER = [  # (what, importer prefixes, forbidden target prefixes)
    ("Runner -> Jobs", ("terrain.runner",), ("terrain.jobs",)),
    ("Summary -> Engine or Blocked", ("terrain.summary",), ("terrain.engine",)),
    ("Outputs -> Jobs or Sweep", ("terrain.outputs",), ("terrain.jobs", "terrain.sweep")),
    ("Guard -> Outputs", ("terrain.resources",), ("terrain.outputs",)),
    ("Engine/Blocked -> IO", ("terrain.engine",), ("terrain.io",)),
    ("Engine -> Blocked", WHOLE_GRID_ENGINE, ("terrain.engine.blocked",)),
    ("Jobs -> Runner", ("terrain.jobs",), ("terrain.runner",)),
    ("IO -> Jobs", ("terrain.io",), ("terrain.jobs",)),
    ("Core -> IO", CORE, ("terrain.io",)),
]


def _within(name: str, prefixes) -> bool:
    return any(name == p or name.startswith(p + ".") for p in prefixes)


def _graph() -> dict[str, set[str]]:
    files = {_module(p): p for p in LIB + CLI}
    return {m: _imports(p, set(files)) for m, p in files.items()}


@pytest.mark.parametrize("rule", NEVER, ids=lambda r: r[0])
def test_no_arrow_runs_where_it_must_not(rule):
    what, sources, targets = rule
    bad = sorted(f"{m} -> {t}" for m, ts in _graph().items() if _within(m, sources)
                 for t in ts if _within(t, targets))
    assert not bad, f"{what}: {bad}"


SCRATCH_NAMES = re.compile(r"\.(?:npy|npz|zarr)\b")


@pytest.mark.parametrize("path", [p for p in LIB if IO not in p.parents],
                         ids=lambda p: str(p.relative_to(ROOT)))
def test_only_io_names_scratch_and_checkpoint_files(path):
    # file names (.npy, .npz, .zarr) are made in terrain/io only; docstrings may mention them
    tree = _tree(path)
    docs = {id(n.body[0].value) for n in ast.walk(tree)
            if isinstance(n, (ast.Module, ast.FunctionDef, ast.ClassDef, ast.AsyncFunctionDef))
            and n.body and isinstance(n.body[0], ast.Expr)
            and isinstance(n.body[0].value, ast.Constant)}
    bad = [f"{path.name}:{n.lineno} {n.value!r}" for n in ast.walk(tree)
           if isinstance(n, ast.Constant) and isinstance(n.value, str) and id(n) not in docs
           and SCRATCH_NAMES.search(n.value)]
    bad += [f"{path.name}:{n.lineno} f-string" for n in ast.walk(tree) if isinstance(n, ast.JoinedStr)
            and any(isinstance(v, ast.Constant) and SCRATCH_NAMES.search(str(v.value))
                    for v in n.values)]
    assert not bad, bad


MAX_MODULE_LINES = 800
# modules waiting for their split, each with the reason (none may be added without one)
OVERSIZE_PENDING: dict[str, str] = {}


def _is_kernel_module(tree: ast.Module) -> bool:
    """A module most of whose function lines are compiled (numba) kernels."""
    fns = [n for n in tree.body if isinstance(n, ast.FunctionDef)]
    compiled = sum(n.end_lineno - n.lineno + 1 for n in fns if _is_compiled(n))
    return compiled * 2 >= sum(n.end_lineno - n.lineno + 1 for n in fns) > 0


@pytest.mark.parametrize("path", LIB + CLI, ids=lambda p: str(p.relative_to(ROOT)))
def test_modules_are_at_most_800_lines_except_kernels(path):
    lines = len(path.read_text().splitlines())
    rel = str(path.relative_to(ROOT))
    if lines <= MAX_MODULE_LINES or _is_kernel_module(_tree(path)):
        return
    assert rel in OVERSIZE_PENDING, f"{rel}: {lines} lines (split it, or make it a kernel module)"


@pytest.mark.parametrize("path", LIB + CLI, ids=lambda p: str(p.relative_to(ROOT)))
def test_private_modules_are_imported_only_inside_their_package(path):
    mod = _module(path)
    own = mod if path.name == "__init__.py" else mod.rsplit(".", 1)[0]
    files = {_module(p) for p in LIB + CLI}
    bad = []
    for target in _imports(path, files):
        parts = target.split(".")
        for k, part in enumerate(parts):
            if part.startswith("_") and not part.startswith("__"):
                package = ".".join(parts[:k])
                if not (own == package or own.startswith(package + ".")):
                    bad.append(f"{mod} -> {target}")
    assert not bad, bad


def test_the_runner_knows_a_blocked_job_by_its_protocol():
    from terrain.jobs import CreditJob
    from terrain.runner.protocols import BlockedJob

    assert isinstance(CreditJob("depressions"), BlockedJob)
    src = (ROOT / "terrain" / "runner" / "blocked.py").read_text()
    assert "jobs" not in {a for n in ast.walk(ast.parse(src)) if isinstance(n, ast.ImportFrom)
                          for a in (n.module or "").split(".")}


# -- the run's layout (whole grid or blocks, in memory or on disk) is decided in one place ------
LAYOUT = ROOT / "terrain" / "layout.py"
GRID_SIZE = {"shape", "rows", "cols", "cells", "size"}


def _name(node: ast.AST) -> str | None:
    return node.id if isinstance(node, ast.Name) else getattr(node, "attr", None)


def _layout_decisions(path: Path, src: str | None = None) -> list[str]:
    """Where ``path`` (or ``src``, read as that file) decides the layout again: it
    reads the default block side, asks a DEM whether it is on disk, or
    compares a grid's size with a block."""
    bad = []
    tree = ast.parse(src) if src is not None else _tree(path)
    for node in ast.walk(tree):
        where = f"{path.relative_to(ROOT)}:{getattr(node, 'lineno', 0)}"
        if isinstance(node, ast.ImportFrom) and any(a.name == "DISK_BLOCK" for a in node.names):
            bad.append(f"{where} imports DISK_BLOCK")
        elif isinstance(node, (ast.Name, ast.Attribute)) and _name(node) == "DISK_BLOCK":
            bad.append(f"{where} reads DISK_BLOCK")
        elif isinstance(node, ast.Attribute) and node.attr == "on_disk" and _name(node.value) == "dem":
            bad.append(f"{where} asks a DEM whether it is on disk")
        elif isinstance(node, ast.Compare):
            names = {_name(n) for n in ast.walk(node)} - {None}
            if any("block" in n.lower() for n in names) and names & GRID_SIZE:
                bad.append(f"{where} compares a grid's size with a block")
    return bad


@pytest.mark.parametrize("path", [p for p in LIB + CLI if p not in (LAYOUT, ROOT / "terrain" / "defaults.py")
                                  and "engine" not in p.relative_to(ROOT).parts],
                         ids=lambda p: str(p.relative_to(ROOT)))
def test_the_layout_is_decided_only_in_terrain_layout(path):
    # whether a run is blocked, its block side and whether its grids live on disk are made
    # once, in terrain/layout.py (RunLayout), and read from there; the engines cut the
    # blocks they are given
    assert not _layout_decisions(path), _layout_decisions(path)


def test_the_layout_check_sees_a_decision():
    src = ("from terrain.defaults import DISK_BLOCK\n"
           "def f(result, block):\n"
           "    if result.dem.on_disk and max(result.dem.shape) <= block:\n"
           "        return block or DISK_BLOCK\n")
    found = _layout_decisions(ROOT / "terrain" / "summary" / "features.py", src)
    assert len(found) == 4, found
