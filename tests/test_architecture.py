"""The house rules of the code, checked by reading the source (Python's ast module).

- no module of the library opens a path except those of the ``terrain/io/`` package;
- no library message names a command-line flag (the CLI maps parameters to flags);
- no module imports a private name from another;
- the import graph of ``terrain`` and ``cli`` has no cycle;
- no function in ``terrain/`` is longer than 60 lines (its docstring not
  counted), except compiled (numba) kernels, and each of those says in a
  docstring what it computes;
- every option of every command has help text.
"""

from __future__ import annotations

import ast
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
