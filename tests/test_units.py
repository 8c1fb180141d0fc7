"""Numbers in the user's units, echoed as used, and the float32 frame of realisations.

Sources: the international foot is 0.3048 m and the US survey foot 1200/3937 m
exactly (NIST Special Publication 811, 2008, appendix B; the US survey foot
retired for new work at the end of 2022, Federal Register 85 FR 62698, 2020);
LE90 = 1.6449 RMSE for normal error (FGDC-STD-007.3-1998, NSSDA); the depth
and storage of a flat-floored lake follow from its construction (floor,
spill level and area of cells of known size); float32 has a 24-bit
significand (IEEE 754-2008), so its step at 1e10 is 1024.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import rasterio

from terrain import CreditJob, Dem, ErrorModel, run_ensemble
from terrain.dem import VERTICAL_UNITS, float32_reference, vertical_unit
from terrain.errors import OptionError
from terrain.io import read_dem
from terrain.summary.features import summarise_features

from .conftest import said, smooth_terrain, write_tif

# runs here draw blank stand-ins for the figures (tests/conftest.py); a test
# marked real_figures draws them
pytestmark = pytest.mark.usefixtures("stand_in_figures")

FOOT = 0.3048  # m, exact (NIST SP 811)
US_FOOT = 1200 / 3937  # m, exact (NIST SP 811)
CELL = 10.0


def test_exact_factors():
    assert VERTICAL_UNITS == {"m": 1.0, "ft": FOOT, "us-ft": US_FOOT}
    assert US_FOOT == pytest.approx(0.3048006096, abs=1e-10)  # NIST SP 811: 0.304 800 6 m


@pytest.mark.parametrize("declared,unit", [("metre", "m"), ("m", "m"), ("Meters", "m"),
                                           ("ft", "ft"), ("foot", "ft"), ("feet", "ft"),
                                           ("US survey foot", "us-ft"), ("ftUS", "us-ft"),
                                           ("us-ft", "us-ft"), ("US_survey_foot", "us-ft"),
                                           ("ft (US survey)", "us-ft")])
def test_declared_units_are_read(declared, unit):
    assert vertical_unit(declared) == (unit, "declared")
    assert vertical_unit(declared, "m") == ("m", "given")  # given wins
    assert vertical_unit(None) == ("m", "assumed") == vertical_unit("  ")


def test_unknown_declared_unit_is_refused_naming_it():
    with pytest.raises(OptionError, match="'cm'.*vertical_unit"):
        vertical_unit("cm", source="dem.tif")
    assert vertical_unit("cm", "m") == ("m", "given")
    with pytest.raises(OptionError, match="vertical_unit"):
        vertical_unit(None, "yd")


def lake(floor=90.0, spill=100.0, n=40, side=10):
    """Constructed for these tests: a flat square lake floor of side x side cells at
    ``floor``, ringed by a flat rim at ``spill`` two cells wide, outside which the ground
    falls 0.5 per cell to the raster edges: depth spill - floor, ponded area side^2
    cells (the rim, at the spill level, holds no water), storage depth x area."""
    r, c = np.mgrid[0:n, 0:n].astype(np.float64)
    d = np.maximum(np.abs(r - (n - 1) / 2), np.abs(c - (n - 1) / 2))  # square rings
    z = spill - 0.5 * np.maximum(d - (side / 2 + 2), 0)  # the rim, then falling outward
    lo, hi = (n - side) // 2, (n - side) // 2 + side
    z[lo:hi, lo:hi] = floor
    return z.astype(np.float32), side * side


@pytest.mark.parametrize("unit,factor,how", [("ft", FOOT, "declared"),
                                             ("US survey foot", US_FOOT, "declared"),
                                             (None, FOOT, "given")])
def test_lake_in_feet_gives_depth_in_feet_and_volume_in_cubic_metres(tmp_path, cairn, unit,
                                                                      factor, how):
    z, cells = lake()
    dem = write_tif(tmp_path / "lake.tif", z, units=unit)
    given = () if how == "declared" else ("--vertical-unit", "ft")
    code, _, err = cairn("depressions", dem, "-o", tmp_path / "out", "--rmse", "0.01",
                         "--min-depth", "2", "-n", "4", "--workers", "1", "-q", *given)
    assert code == 0, err
    pits = pd.read_csv(tmp_path / "out" / "pits.csv")
    row = pits.iloc[0]
    area = cells * CELL * CELL
    assert row["unperturbed"] == 10.0  # feet: spill 100 - floor 90
    assert row["ponded_area_m2"] == area  # m^2 whatever the vertical unit
    # m^3 by the exact factor: 10 ft x 0.3048 m/ft x 10 000 m^2 = 30 480 m^3 (international)
    assert row["volume_m3"] == round(10.0 * factor * area, 2)
    assert row["expected"] == pytest.approx(10.0, abs=0.1)  # RMSE 0.01 ft
    assert row["volume_mean_m3"] == pytest.approx(10.0 * factor * area, rel=0.01)
    run = json.loads((tmp_path / "out" / "run.json").read_text())
    want = "ft" if factor == FOOT else "us-ft"
    assert run["input"]["vertical_unit"] == want
    assert run["input"]["vertical_unit_source"] == how
    assert run["input"]["metres_per_vertical_unit"] == factor
    label = "ft" if want == "ft" else "US survey ft"
    with rasterio.open(tmp_path / "out" / "pit_credit.tif") as ds:
        assert ds.units[0] == label and f"({label})" in ds.descriptions[0]


def test_undeclared_unit_is_metres_with_one_warning(tmp_path, cairn):
    z, _ = lake()
    dem = write_tif(tmp_path / "lake.tif", z)
    code, _, err = cairn("depressions", dem, "-o", tmp_path / "out", "--rmse", "0.01",
                         "--min-depth", "2", "-n", "2", "--workers", "1", "-q")
    assert code == 0, err
    lines = [x for x in err.splitlines() if "vertical unit" in x]
    assert len(lines) == 1 and "metres" in lines[0] and "--vertical-unit" in lines[0]
    run = json.loads((tmp_path / "out" / "run.json").read_text())
    assert run["input"]["vertical_unit"] == "m" and run["input"]["vertical_unit_source"] == "assumed"
    code, out, _ = cairn("inspect", dem)
    assert code == 0 and "assumed" in out


def test_given_unit_against_the_files_says_so(tmp_path, cairn):
    z, _ = lake()
    dem = write_tif(tmp_path / "lake.tif", z, units="metre")
    d = read_dem(dem, vertical_unit="us-ft")
    assert d.vertical_unit == "us-ft" and d.metres_per_unit == US_FOOT
    code, _, err = cairn("depressions", dem, "-o", tmp_path / "out", "--rmse", "0.01",
                         "--min-depth", "2", "-n", "2", "--workers", "1", "-q",
                         "--vertical-unit", "us-ft")
    assert code == 0 and "declares the vertical unit 'metre'" in err
    code, _, err = cairn("depressions", dem, "-o", tmp_path / "o2", "--rmse", "1",
                         "--vertical-unit", "yards")
    assert code == 2 and "--vertical-unit" in err


def test_headers_and_footers_echo_the_numbers_used(tmp_path, cairn):
    # LE90 = 1.6449 RMSE (NSSDA): LE90 4 m is RMSE 2.43 m; the default cut-off 3 x RMSE
    z = smooth_terrain((50, 60), seed=2)
    dem = write_tif(tmp_path / "d.tif", z, units="metre")
    code, _, err = cairn("peaks", dem, "-o", tmp_path / "p", "--le90", "4", "-n", "2",
                         "--workers", "1", "-q")
    assert code == 0, err
    # -q keeps the header quiet; the footer and run.json carry the numbers
    from terrain.outputs.plot import run_footer

    d = read_dem(dem)
    job = CreditJob("peaks").resolved(d, ErrorModel(rmse=4 / 1.6449))
    res = run_ensemble(d, job, ErrorModel(rmse=4 / 1.6449, accuracy=("le90", 4.0)),
                       realisations=2, backend="serial")
    text = run_footer(res)
    assert "LE90 4 m = RMSE 2.43 m" in text and "minimum prominence 7.3 m (3 × RMSE)" in text
    code, _, err = cairn("depressions", dem, "-o", tmp_path / "d", "--rmse", "2.5", "-n", "2",
                         "--workers", "1")
    assert code == 0, err
    assert "minimum depth 7.5 m (3 × RMSE)" in err and "merge level 5 m (2 × RMSE)" in err
    assert "RMSE 2.5 m (gaussian)" in err


# -- the float32 frame -------------------------------------------------------------
def test_float64_dem_far_from_zero_keeps_its_resolution():
    # a float64 DEM around 1e10: float32 steps by 1024 there, so without an offset every
    # figure would be a multiple of 1024; relative to the lowest cell the run gives the
    # same figures as the same relief near zero
    z = smooth_terrain((60, 60), seed=1).astype(np.float64)
    runs = {}
    for offset in (0.0, 1e10):
        dem = Dem.from_array(z + offset, cellsize=CELL)
        res = run_ensemble(dem, CreditJob("depressions"), ErrorModel(rmse=0.5), realisations=6,
                           seed=1, backend="serial")
        runs[offset] = (res, summarise_features(res).table)
    (_, t0), (r1, t1) = runs[0.0], runs[1e10]
    assert r1.job.reference == pytest.approx(1e10 + float(np.min(z)), abs=1e-3)
    assert float(np.spacing(np.float32(1e10))) == 1024.0
    np.testing.assert_allclose(t1["unperturbed"], t0["unperturbed"], atol=1e-5)
    np.testing.assert_allclose(t1["expected"], t0["expected"], atol=1e-3)
    assert (t1["expected"] % 1024 != 0).all() and (t1["expected"] < 200).all()
    np.testing.assert_allclose(t1["spill_elevation"] - 1e10, t0["spill_elevation"], atol=1e-3)


def test_float32_step_over_a_tenth_of_the_rmse_is_refused(tmp_path, cairn):
    # float32 input is exact in float32: used as it is, whatever the RMSE
    assert float32_reference([np.array([177.0, 532.0])], 177.0, 4, 1e-9) == 0.0
    # float64 input 1e10 above its lowest cell: float32 steps by 1024 there
    with pytest.raises(OptionError, match="float32.*rmse"):
        float32_reference([np.array([-1e10, 300.3])], -1e10, 8, 1.0)
    # whole numbers are exact in float32 relative to the minimum, however small the RMSE
    assert float32_reference([np.array([1e10, 1e10 + 355])], 1e10, 8, 1e-9) == 1e10
    z = smooth_terrain((30, 30), seed=3).astype(np.float64)
    z[0, 0] = -1e10  # an undeclared nodata value
    dem = Dem.from_array(z, cellsize=CELL)
    with pytest.raises(OptionError, match="nodata"):
        run_ensemble(dem, CreditJob("peaks"), ErrorModel(rmse=1.0), realisations=1,
                     backend="serial")
    path = write_tif(tmp_path / "wide.tif", z, dtype="float64", units="metre")
    code, _, err = cairn("peaks", path, "-o", tmp_path / "out", "--rmse", "1", "-n", "1")
    lines = said(err)
    assert code == 2 and len(lines) == 1 and "float32" in lines[0] and "--rmse" in lines[0]
    assert not (tmp_path / "out" / "summits.csv").exists()
