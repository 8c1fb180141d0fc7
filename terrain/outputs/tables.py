"""The precision tables are written with: decimals per kind of column.

Each table declares what every column *is* (its kind) beside its column
list (:data:`terrain.summary.features.COLUMN_KINDS`,
:data:`terrain.summary.catchments.CATCHMENT_COLUMN_KINDS`,
:data:`terrain.sweep.SWEEP_COLUMN_KINDS`,
:data:`terrain.sweep.SENSITIVITY_COLUMN_KINDS`); :func:`rounded` turns the
kinds into decimals. The precision follows from the kind, never from the
values, so a column keeps one precision in every run. A new column gets a
kind where its table's columns are listed; a column without one is written
at full precision (and the tests ask for a kind).

=============  =========  ====================================================
kind           decimals   what
=============  =========  ====================================================
vertical       2          elevations, prominences, depths and their standard
                          errors and percentiles (0.01 of the vertical unit)
credit         4          expected credit per cell (vertical units or counts
                          per realisation; often far below one unit)
cell_mean      8          a per-cell credit averaged over every cell of the
                          raster, most of them zero (a kernel comparison's
                          mean difference and its noise floor)
probability    4          probabilities and shares of realisations or credit,
                          and their standard errors
coordinate     2 / 7      x, y: 0.01 of a projected CRS unit; 7 decimals of a
                          degree (about 1 cm) in a geographic CRS
area           2          square metres (CRS units squared without a CRS)
volume         2          cubic metres
distance       1          metres (a summit's isolation)
mean_rank      2          a rank averaged over realisations
id, integer,   as is      identifiers, counts, yes/no flags, names and the run
flag, text,               parameters a row belongs to (an error level as the
parameter                 user gave it)
=============  =========  ====================================================
"""

from __future__ import annotations

import pandas as pd

__all__ = ["DECIMALS", "AS_IS", "GEOGRAPHIC_COORDINATE_DECIMALS", "rounded"]

DECIMALS = {"vertical": 2, "credit": 4, "cell_mean": 8, "probability": 4, "coordinate": 2,
            "area": 2, "volume": 2, "mean_rank": 2, "distance": 1}
AS_IS = frozenset({"id", "integer", "flag", "text", "parameter"})
GEOGRAPHIC_COORDINATE_DECIMALS = 7  # 1e-7 degree of latitude is about 1.1 cm


def rounded(frame: pd.DataFrame, kinds: dict[str, str], *, geographic: bool = False) -> pd.DataFrame:
    """A copy of ``frame`` with each column rounded as its kind says.

    Parameters
    ----------
    frame : DataFrame
        A table (a geometry column, if any, is left alone).
    kinds : dict
        Column name -> kind (see the module docstring). Columns without a
        kind are kept at full precision.
    geographic : bool
        The coordinates are degrees (a geographic CRS).

    Raises
    ------
    KeyError
        A kind that is not in the table above (a programming error).

    Examples
    --------
    >>> df = pd.DataFrame({"feature_id": [1], "expected": [193.74609619140625],
    ...                    "p_first": [0.123456], "x": [512345.678912]})
    >>> kinds = {"feature_id": "id", "expected": "vertical", "p_first": "probability",
    ...          "x": "coordinate"}
    >>> rounded(df, kinds).iloc[0].tolist()
    [1.0, 193.75, 0.1235, 512345.68]
    """
    decimals = {}
    for col in frame.columns:
        kind = kinds.get(col)
        if kind is None or kind in AS_IS:
            continue
        decimals[col] = (GEOGRAPHIC_COORDINATE_DECIMALS if kind == "coordinate" and geographic
                         else DECIMALS[kind])
    return frame.round(decimals)
