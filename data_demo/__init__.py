"""Demo data shipped with cairn (installed as ``cairn_demo_data``).

``veldmarrow.tif`` is the invented upland of Veldmarrow Fells, made by
``make_demo.py`` in this folder (deterministic; rerun it to rebuild the file).
"""

from pathlib import Path

DEM_PATH = str(Path(__file__).with_name("veldmarrow.tif"))
