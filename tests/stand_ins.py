"""Blank stand-ins for cairn's quick-look figures, for tests about something else.

The figures cost seconds a run; tests/test_pictures.py, tests/test_cli.py's demo run
and the tests marked ``real_figures`` check the real ones. Used in a test's own
process (conftest's ``stand_in_figures`` fixture) and in the command lines a test
starts in processes of their own (``conftest.cli_command(stand_in_figures=True)``).
Every file is still written and published as in a real run.
"""

from __future__ import annotations

FIGURES = ("feature_map", "ranking_chart", "catchment_map", "sweep_figure")


def blank_figure(*args, **kwargs):
    """A small blank figure (matplotlib's Agg canvas), drawn in milliseconds."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(1, 1), dpi=10)
    FigureCanvasAgg(fig)
    return fig


def install() -> None:
    """Replace the figures in this process (a command line started by a test)."""
    from terrain.outputs import plot

    for name in FIGURES:
        setattr(plot, name, blank_figure)
