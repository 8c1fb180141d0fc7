"""Blank stand-ins for cairn's quick-look figures, for tests about something else.

The figures cost seconds a run; tests/test_pictures.py, tests/test_cli.py's demo run
and the tests marked ``real_figures`` check the real ones. Used in a test's own
process (conftest's ``stand_in_figures`` fixture) and in the command lines a test
starts in processes of their own (``conftest.cli_command(stand_in_figures=True)``).
Every file is still written and published as in a real run; a process that draws
only stand-ins never imports matplotlib's figure machinery or adjustText (about
1 s of CPU a process, measured on a 40 x 40 run).
"""

from __future__ import annotations

import struct
import zlib

#: (module in terrain.outputs, function) of every figure
FIGURES = (("plot", "feature_map"), ("plot", "ranking_chart"), ("plot", "catchment_map"),
           ("sweepchart", "sweep_figure"))


def _chunk(kind: bytes, data: bytes) -> bytes:
    return (struct.pack(">I", len(data)) + kind + data
            + struct.pack(">I", zlib.crc32(kind + data) & 0xFFFFFFFF))


#: A valid 1 x 1 white PNG (PNG specification, W3C 2003: signature, IHDR, IDAT, IEND).
BLANK_PNG = (b"\x89PNG\r\n\x1a\n" + _chunk(b"IHDR", struct.pack(">IIBBBBB", 1, 1, 8, 2, 0, 0, 0))
             + _chunk(b"IDAT", zlib.compress(b"\x00\xff\xff\xff")) + _chunk(b"IEND", b""))


class BlankFigure:
    """What the writer does with a figure, for a stand-in: ``savefig`` a PNG."""

    def savefig(self, fname, **kwargs) -> None:
        with open(fname, "wb") as fh:
            fh.write(BLANK_PNG)


def blank_figure(*args, **kwargs) -> BlankFigure:
    """A stand-in for one of :data:`FIGURES`: a blank 1 x 1 PNG when saved."""
    return BlankFigure()


def no_drawing_to_prepare(*args, **kwargs) -> None:
    """A stand-in for ``mapframe.prepare_drawing``: nothing will be drawn."""


def targets():
    """(module, attribute, stand-in) for every name :func:`install` replaces."""
    import importlib

    from terrain.outputs import mapframe

    out = [(importlib.import_module(f"terrain.outputs.{module}"), name, blank_figure)
           for module, name in FIGURES]
    out.append((mapframe, "prepare_drawing", no_drawing_to_prepare))
    return out


def install() -> None:
    """Replace the figures in this process (a command line started by a test)."""
    for module, name, stand_in in targets():
        setattr(module, name, stand_in)
