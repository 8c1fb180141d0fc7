"""The README's code blocks run exactly as written, and a library that cannot hang.

The blocks are run as scripts in a folder holding a small generated
``dem.tif`` (the name the README uses).
"""

from __future__ import annotations

import re
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


@pytest.mark.parametrize("k", range(len(_blocks())))
def test_readme_block_runs_as_written(workdir, k):
    p = _run(_blocks()[k], workdir)
    assert p.returncode == 0, p.stderr[-2000:]


def test_missing_main_guard_fails_fast_with_the_cure(workdir):
    # the README's example with its main guard removed: worker processes re-import
    # the script; the run must end within seconds and say what to add
    code = next(b for b in _blocks() if '__name__ == "__main__"' in b)
    head, body = re.split(r'if __name__ == "__main__":.*\n', code, maxsplit=1)
    code = head + textwrap.dedent(body).replace("workers=1", "workers=2")
    if "workers=" not in code:
        code = code.replace("seed=1", "seed=1, workers=2")
    t = time.time()
    p = _run(code, workdir, timeout=120)
    assert p.returncode != 0
    assert time.time() - t < 60
    last = p.stderr.strip().splitlines()[-1]
    assert "WorkerError" in last and '__name__ == "__main__"' in last, p.stderr[-2000:]
