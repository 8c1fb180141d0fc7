"""A rich progress bar with realisations per second and time remaining."""

from __future__ import annotations

import contextlib
import sys


@contextlib.contextmanager
def progress_bar(*, enabled: bool, label: str):
    """Yield a ``callback(done, total)``; draws nothing when disabled."""
    if not enabled:
        yield None
        return
    from rich.console import Console
    from rich.progress import (
        BarColumn,
        MofNCompleteColumn,
        Progress,
        ProgressColumn,
        TextColumn,
        TimeElapsedColumn,
        TimeRemainingColumn,
    )
    from rich.text import Text

    class Rate(ProgressColumn):
        def render(self, task):
            speed = task.finished_speed or task.speed
            return Text(f"{speed:.1f} real/s" if speed else "… real/s")

    prog = Progress(TextColumn(f"[bold]{label}"), BarColumn(), MofNCompleteColumn(), Rate(),
                    TimeElapsedColumn(), TextColumn("ETA"), TimeRemainingColumn(),
                    console=Console(file=sys.stderr), transient=False)
    task = None

    def cb(done, total):
        nonlocal task
        if task is None:
            task = prog.add_task(label, total=total, completed=done)
        prog.update(task, completed=done, total=total)

    with prog:
        yield cb
