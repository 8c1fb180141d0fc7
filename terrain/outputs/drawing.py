"""Figures drawn in a second process while the layers and tables are written.

Drawing is interpreter-bound Python (matplotlib lays out text, builds paths
and calls its renderer one artist at a time), and so is much of writing a
GeoPackage; in two threads of one process they take turns. A
:class:`FigureProcess` is a second Python process that imports the drawing
libraries as soon as it starts (while the realisations run, when a command
line starts it before them), then waits for the figures to draw: the caller
gathers each figure's *sheet* (what it draws, at the map's resolution:
:class:`terrain.outputs.plot.FeatureMapSheet`,
:class:`terrain.outputs.plot.ChartSheet`) in a thread of its own, sends it
down a pipe, and writes the layers and tables meanwhile; the process draws
and saves each figure (through :func:`terrain.io.write_figure`: a temporary
name, checked and renamed) and says which it made.

It only saves time. When it cannot start, dies, hangs past
:data:`WAIT_SECONDS` or fails, :meth:`FigureProcess.wait` says which figures
it did not make and the caller draws them itself with the same code, so a
figure that cannot be drawn fails there, in the caller's own words; and the
figures are byte for byte the same either way (tests/test_drawing.py).

Memory: the process holds the plotting libraries (about 150 MB resident,
measured with matplotlib 3.10) and one sheet at a time (a few float64
arrays of at most :data:`terrain.layers.QUICKLOOK_CELLS` cells).
"""

from __future__ import annotations

import os
import pickle
import signal
import subprocess
import sys
import threading
import time
from collections.abc import Callable
from pathlib import Path

__all__ = ["FigureProcess", "start_figure_process", "WAIT_SECONDS"]

#: the longest the caller waits for the figures after its own writing is done; then the
#: process is ended and the caller draws what it had not made
WAIT_SECONDS = 300.0


def start_figure_process() -> FigureProcess | None:
    """A :class:`FigureProcess`, started; None when no process can be started."""
    try:
        return FigureProcess()
    except OSError:
        return None


class FigureProcess:
    """A second Python process that draws figures (see the module docstring).

    Use as a context manager, or call :meth:`close`: the process is ended when
    the block is left, drawn or not.
    """

    def __init__(self):
        import terrain

        root = str(Path(terrain.__file__).resolve().parent.parent)  # this very package
        env = {**os.environ, "PYTHONPATH": os.pathsep.join(
            [root] + [p for p in os.environ.get("PYTHONPATH", "").split(os.pathsep) if p])}
        self.proc = subprocess.Popen([sys.executable, "-m", __name__], stdin=subprocess.PIPE,
                                     stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, env=env)
        self.sender: threading.Thread | None = None
        self.wanted: list[Path] = []
        self.failed = False
        #: each figure's seconds in the process: (drawing, saving)
        self.seconds: dict = {}

    def draw(self, jobs: dict[Path, tuple[Callable, Callable[[], object]]]) -> None:
        """Have the process draw ``jobs`` (destination: (draw function, sheet
        maker)); returns at once. A thread of this process makes each sheet
        and sends them; each figure is ``draw(sheet)`` saved to its
        destination."""
        self.wanted = list(jobs)

        def send():
            try:
                request = {Path(dest): (draw, make()) for dest, (draw, make) in jobs.items()}
                pickle.dump(request, self.proc.stdin, protocol=pickle.HIGHEST_PROTOCOL)
                self.proc.stdin.close()
            except BaseException:  # noqa: BLE001 -- the caller draws them itself
                self.failed = True

        self.sender = threading.Thread(target=send, name="cairn-figure-sheets", daemon=True)
        self.sender.start()

    def wait(self) -> list[Path]:
        """Wait for the figures; return the destinations the process did not make."""
        if self.sender is None:
            return list(self.wanted)
        self.sender.join()
        made: list = []
        if not self.failed:
            reply: dict = {}
            reader = threading.Thread(target=lambda: reply.update(_read(self.proc.stdout)),
                                      name="cairn-figure-reply", daemon=True)
            reader.start()
            reader.join(WAIT_SECONDS)
            made = reply.get("made", [])
            self.seconds = reply.get("seconds", {})
        self.close()
        return [d for d in self.wanted if Path(d) not in set(map(Path, made))]

    def close(self) -> None:
        """End the process (if it still runs) and release its pipes."""
        if self.proc.poll() is None:
            self.proc.kill()
        self.proc.wait()
        for pipe in (self.proc.stdin, self.proc.stdout):
            try:
                pipe.close()
            except OSError:  # a pipe the process left broken
                pass

    def __enter__(self) -> FigureProcess:
        return self

    def __exit__(self, *exc) -> bool:
        self.close()
        return False


def _read(stream) -> dict:
    try:
        reply = pickle.load(stream)
    except Exception:  # noqa: BLE001 -- the process ended without a reply
        return {}
    return reply if isinstance(reply, dict) else {}


def _warm_up() -> None:
    """Render one small figure with text in the house sizes and weights, so the
    fonts are loaded and the renderer is ready before the real figures come.
    Changes no setting."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    from .style import FONT_PT

    fig = Figure(figsize=(2, 1), dpi=50)
    FigureCanvasAgg(fig)
    ax = fig.add_subplot()
    ax.plot([0, 1], [0, 1], marker="^")
    ax.set_title("peaks 0.5", fontsize=FONT_PT + 3, weight="bold")
    ax.text(0.5, 0.5, "#1 12 m", fontsize=FONT_PT)
    fig.canvas.draw()


def _serve() -> int:
    """The process's side: import, warm up, read one request, draw it, reply."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # the caller decides; it ends this process
    reply = os.fdopen(os.dup(1), "wb")
    os.dup2(2, 1)  # stray prints must not reach the reply: to the error stream (discarded)
    from ..io import write_figure
    from . import plot  # noqa: F401 -- the sheets' classes and the drawing functions
    from .mapframe import prepare_drawing
    from .writer import plain_text

    prepare_drawing(None)
    _warm_up()
    try:
        request = pickle.load(sys.stdin.buffer)
    except EOFError:  # the caller drew nothing here
        return 0
    made, error, seconds = [], None, {}
    try:
        with plain_text():
            for dest, (draw, sheet) in request.items():
                t0 = time.perf_counter()
                fig = draw(sheet)
                t1 = time.perf_counter()
                write_figure(dest, fig)
                seconds[Path(dest).name] = (round(t1 - t0, 3), round(time.perf_counter() - t1, 3))
                made.append(dest)
    except Exception as exc:  # noqa: BLE001 -- the caller draws it again and reports it
        error = f"{type(exc).__name__}: {exc}"
    pickle.dump({"made": made, "error": error, "seconds": seconds}, reply)
    reply.flush()
    return 0


if __name__ == "__main__":
    sys.exit(_serve())
