"""The README's code blocks run exactly as written, and a library that cannot hang.

The blocks are run as scripts in a folder holding a small generated
``dem.tif`` (the name the README uses).
"""

from __future__ import annotations

import contextlib
import os
import re
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import numpy as np
import pytest

from .conftest import smooth_terrain, write_tif

README = Path(__file__).resolve().parents[1] / "README.md"


def _blocks() -> list[str]:
    return re.findall(r"```python\n(.*?)```", README.read_text(), flags=re.S)


@pytest.fixture
def workdir(tmp_path):
    write_tif(tmp_path / "dem.tif", np.round(smooth_terrain((60, 70), seed=3)).astype(np.int16),
              units="metre")
    return tmp_path


def _run(code: str, cwd: Path, timeout: float = 300):
    script = cwd / "example.py"
    script.write_text(code)
    return subprocess.run([sys.executable, str(script)], cwd=cwd, capture_output=True, text=True,
                          timeout=timeout)


def test_readme_has_python_blocks():
    assert _blocks(), "the README shows the library in at least one python block"


@pytest.mark.slow
@pytest.mark.parametrize("k", range(len(_blocks())))
def test_readme_block_runs_as_written(workdir, k):
    p = _run(_blocks()[k], workdir)
    assert p.returncode == 0, p.stderr[-2000:]


def _unguarded(workers: int = 2) -> str:
    """The README's example with its main guard removed."""
    code = next(b for b in _blocks() if '__name__ == "__main__"' in b)
    head, body = re.split(r'if __name__ == "__main__":.*\n', code, maxsplit=1)
    code = head + textwrap.dedent(body).replace("workers=1", f"workers={workers}")
    if "workers=" not in code:
        code = code.replace("seed=1", f"seed=1, workers={workers}")
    return code


def _group_gone(pgid: int, within: float = 5.0) -> bool:
    """True once no process of the process group ``pgid`` is left."""
    end = time.monotonic() + within
    while time.monotonic() < end:
        try:
            os.killpg(pgid, 0)
        except ProcessLookupError:
            return True
        time.sleep(0.05)
    return False


def _start(code: str, cwd: Path) -> subprocess.Popen:
    (cwd / "example.py").write_text(code)
    return subprocess.Popen([sys.executable, "example.py"], cwd=cwd, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True, start_new_session=True)


def _allowed(seconds: float) -> float:
    """``seconds`` on an idle machine, stretched by how oversubscribed its cores are
    now (load average per core, when above 1): the promise is about cairn, not about
    other programs sharing the CPU."""
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else 0.0
    return seconds * max(1.0, load / (os.cpu_count() or 1))


@pytest.mark.slow
def test_missing_main_guard_fails_fast_with_the_cure(workdir):
    # worker processes re-import the script; the run must end within 10 s (on a machine
    # not shared with other work), say what to add, and leave no process behind
    limit = _allowed(10)
    t = time.monotonic()
    p = _start(_unguarded(), workdir)
    try:
        _, err = p.communicate(timeout=limit)
    finally:
        with contextlib.suppress(ProcessLookupError):
            os.killpg(p.pid, signal.SIGKILL)
    assert p.returncode != 0
    assert time.monotonic() - t < limit
    last = err.strip().splitlines()[-1]
    assert "WorkerError" in last and '__name__ == "__main__"' in last, err[-2000:]
    assert _group_gone(p.pid), "a worker process outlived the script"


@pytest.mark.slow
@pytest.mark.parametrize("guarded", [True, False])
@pytest.mark.parametrize("after", [0.3, 1.5, 3.0])
def test_sigterm_ends_a_script_at_any_moment(workdir, guarded, after):
    code = _blocks()[0] if guarded else _unguarded()
    p = _start(code, workdir)
    time.sleep(after)
    with contextlib.suppress(ProcessLookupError):
        os.killpg(p.pid, signal.SIGTERM) if p.poll() is None else None
    try:
        p.communicate(timeout=_allowed(10))
    except subprocess.TimeoutExpired:
        os.killpg(p.pid, signal.SIGKILL)
        pytest.fail(f"SIGTERM after {after} s did not end the script within 10 s")
    assert _group_gone(p.pid), "a worker process outlived the script"


# -- the guard is read from the script before any work (terrain.runner.backends) --------
@pytest.mark.parametrize("source,refused", [
    ("run()\n", True),
    ("def main():\n    run()\n\n\nmain()\n", True),
    ('if __name__ == "__main__":\n    run()\n', False),
    ('if "__main__" == __name__ and True:\n    run()\n', False),
    ('def main():\n    run()\n\n\nif __name__ == "__main__":\n    main()\n', False),
    ('if __name__ == "__main__":\n    pass\nrun()\n', True),
    ("with open(__file__) as fh:\n    run()\n", True),
    ("class Job:\n    result = run()\n", True),
    ('main = lambda: run()\nmain() if __name__ == "__main__" else None\n', False),
    ('__name__ == "__main__" and run()\n', False),
    ('IS_MAIN = __name__ == "__main__"\nif IS_MAIN:\n    run()\n', False),
    ('if __name__ == "__main__":\n    exec("run()")\n', False),  # cProfile.run and the like
    ("@guarded(__name__)\ndef main():\n    run()\n", False),  # a guard decorator
])
def test_a_run_started_outside_the_main_guard_is_refused_before_any_work(
        tmp_path, monkeypatch, source, refused):
    import types

    from terrain.errors import WorkerError
    from terrain.runner.backends import refuse_unguarded

    script = tmp_path / "s.py"
    script.write_text(source)
    module = types.ModuleType("__main__")  # the script, run as python s.py runs it
    module.__file__ = str(script)
    module.run = refuse_unguarded
    module.guarded = lambda name: (lambda f: f() if name == "__main__" else f)
    monkeypatch.setitem(sys.modules, "__main__", module)
    code = compile(source, str(script), "exec", dont_inherit=True)
    if refused:
        with pytest.raises(WorkerError, match=r's\.py, line \d+: .*__name__ == "__main__"'):
            exec(code, vars(module))
    else:
        exec(code, vars(module))
    # the script changed on disk since it started: its line numbers are not trusted
    script.write_text("# a line added above\n" + source)
    exec(code, vars(module))
    script.write_text(source)
    # python -m package: multiprocessing does not run a package's __main__.py again in
    # its workers (multiprocessing.spawn, _fixup_main_from_name), so nothing is refused
    module.__spec__ = types.SimpleNamespace(name="tool.__main__")
    exec(code, vars(module))
    # python -c, a notebook, an interactive session: no script to read, nothing refused
    module.__spec__ = None
    del module.__file__
    exec(compile("run()\n", "<string>", "exec"), vars(module))
