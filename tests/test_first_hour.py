"""A newcomer's first hour: the README's set-up commands, and numba's cache kept out of the package.

Numba's ``cache=True`` writes compiled kernels beside the source unless told
otherwise; for an installed package that is ``site-packages``, where pip's
uninstall leaves them (and an empty ``terrain`` folder that shadows a later
editable install). cairn points numba at a per-user cache folder instead.
"""

from __future__ import annotations

import os
import re
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


def _python(code: str, env: dict, cwd=None) -> subprocess.CompletedProcess:
    full = {k: v for k, v in os.environ.items() if not k.startswith("NUMBA_CACHE")}
    full.update(env)
    return subprocess.run([sys.executable, "-c", textwrap.dedent(code)], env=full, cwd=cwd,
                          capture_output=True, text=True, timeout=300)


def _kernel_files(folder: Path) -> set[Path]:
    return {p for p in folder.rglob("*") if p.suffix in (".nbi", ".nbc")}


def test_ci_runs_the_readme_commands_in_order_in_one_venv():
    readme = (ROOT / "README.md").read_text()
    blocks = [b.strip() for b in re.findall(r"```\n(.*?)```", readme, flags=re.S)]
    setup = [b for b in blocks if b.startswith("pip install")]
    assert setup[:2] == ['pip install . && cairn demo', 'pip install -e ".[test]" && pytest']
    ci = [ln.strip() for ln in (ROOT / ".ci" / "run").read_text().splitlines()
          if ln.strip() and not ln.lstrip().startswith("#")]
    i, j = ci.index(setup[0]), ci.index(setup[1])
    assert i < j and sum("venv" in ln for ln in ci[i:]) == 0, "one venv for both commands"


def test_the_demo_folder_is_ignored_by_git():
    # the demo writes cairn-demo/ into the folder it runs in: the clone's root in the README
    lines = (ROOT / ".gitignore").read_text().split()
    assert "/cairn-demo/" in lines


def test_kernels_are_cached_in_the_user_cache_folder_not_the_package(tmp_path):
    import terrain

    package = Path(terrain.__file__).parent
    before = _kernel_files(package)
    cache = tmp_path / "cache"
    p = _python("""
        import terrain
        from numba.core import config
        from terrain.engine.grid import DC8, DR8, neighbour
        neighbour(1, 1, 0, 3, 3, DR8, DC8)  # compiles (and caches) one small kernel
        print(config.CACHE_DIR)
    """, {"XDG_CACHE_HOME": str(cache)})
    assert p.returncode == 0, p.stderr
    used = Path(p.stdout.strip().splitlines()[-1])
    assert used == cache / "cairn" / "numba" / terrain.__version__
    assert _kernel_files(used), "compiled kernels are kept in the user cache"
    assert _kernel_files(package) == before, "nothing compiled is written into the package"


def test_a_cache_folder_chosen_by_the_user_is_kept(tmp_path):
    p = _python("""
        import terrain
        from numba.core import config
        print(config.CACHE_DIR)
    """, {"NUMBA_CACHE_DIR": str(tmp_path / "mine"), "XDG_CACHE_HOME": str(tmp_path / "x")})
    assert p.returncode == 0, p.stderr
    assert p.stdout.strip() == str(tmp_path / "mine")


@pytest.mark.slow
def test_an_unwritable_user_cache_falls_back_to_the_temporary_folder(tmp_path):
    # a cache home that is a file cannot hold folders (a read-only home behaves alike;
    # chmod does not stop root, so the test does not rely on it)
    blocker = tmp_path / "not-a-folder"
    blocker.write_text("")
    p = _python("""
        import terrain
        from numba.core import config
        from terrain.engine.grid import DC8, DR8, neighbour
        neighbour(1, 1, 0, 3, 3, DR8, DC8)
        print(config.CACHE_DIR)
    """, {"XDG_CACHE_HOME": str(blocker), "TMPDIR": str(tmp_path)})
    assert p.returncode == 0, p.stderr
    used = Path(p.stdout.strip())
    assert used.parent.parent == tmp_path and used.parent.name.startswith("cairn-numba-")
    assert _kernel_files(used)


@pytest.mark.slow
def test_a_changed_source_never_loads_the_old_kernels(tmp_path):
    # Two versions share a cache folder (or one version is replaced in place): numba keys
    # each entry by the source file's path and a hash of its contents (numba 0.60+ caching
    # documentation), so a kernel whose source changed is compiled afresh even when the new
    # file has the old size and time stamp.
    mod = tmp_path / "pkg" / "kern.py"
    mod.parent.mkdir()
    src = "from numba import njit\n\n@njit(cache=True)\ndef f():\n    return {}\n"
    mod.write_text(src.format(1))
    stamp = os.stat(mod)
    # (no bytecode cache: Python's own .pyc is keyed by time stamp and size alone, and
    # would hand the old source to numba)
    env = {"NUMBA_CACHE_DIR": str(tmp_path / "cache"), "PYTHONPATH": str(mod.parent),
           "PYTHONDONTWRITEBYTECODE": "1"}
    first = _python("import kern; print(kern.f())", env)
    assert first.stdout.strip() == "1", first.stderr
    mod.write_text(src.format(2))
    os.utime(mod, ns=(stamp.st_atime_ns, stamp.st_mtime_ns))
    assert os.stat(mod).st_size == stamp.st_size
    second = _python("import kern; print(kern.f())", env)
    assert second.stdout.strip() == "2", second.stderr


def test_every_package_is_installed():
    # a non-editable install ships only the packages pyproject lists: each folder of
    # terrain/ with an __init__.py must be one of them
    import tomllib

    root = Path(__file__).resolve().parents[1]
    listed = set(tomllib.loads((root / "pyproject.toml").read_text())["tool"]["setuptools"]["packages"])
    found = {".".join(p.parent.relative_to(root).parts) for p in (root / "terrain").rglob("__init__.py")}
    assert found <= listed, f"pyproject.toml does not list {sorted(found - listed)}"
