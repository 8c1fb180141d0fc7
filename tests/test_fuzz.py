"""Property tests through the whole Python pipeline: pairs -> credit -> features -> writers.

Small random rasters with NaN, inf, ties and constants (hypothesis). Checks:
only cairn's own errors are raised; probabilities lie in [0, 1]; standard
errors are >= 0; credit is conserved (total birth credit x N equals the total
weight of counted pairs; Monte Carlo bookkeeping identity, common practice).
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from terrain.dem import Dem
from terrain.errors import CairnError
from terrain.jobs import CreditJob
from terrain.jobs.credit import log_weights
from terrain.layers import layer_name
from terrain.noise import ErrorModel
from terrain.outputs.writer import write_credit_run
from terrain.runner import run_ensemble
from terrain.summary.features import summarise_features

cells = st.one_of(st.floats(-50, 50, width=32), st.sampled_from([0.0, 3.0, np.nan, np.inf, -np.inf]))


@pytest.mark.slow
@settings(max_examples=20, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(z=arrays(np.float32, st.tuples(st.integers(1, 8), st.integers(1, 8)), elements=cells),
       kind=st.sampled_from(["peaks", "depressions"]), weight=st.sampled_from(["persistence", "count"]),
       kernel=st.sampled_from(["gaussian", "uniform", "triangular", "epanechnikov"]),
       thr=st.sampled_from([0.0, 0.5, 5.0]), jitter=st.sampled_from([0.0, 0.3]),
       conn=st.sampled_from([4, 8]))
def test_pipeline_properties(tmp_path_factory, stand_in_figures, z, kind, weight, kernel, thr,
                            jitter, conn):
    # the figures are blank stand-ins here: degenerate rasters draw real ones in
    # test_bad_input.py::test_tiny_and_constant_rasters
    out = tmp_path_factory.mktemp("fuzz")
    try:
        dem = Dem.from_array(z, cellsize=5.0, crs="EPSG:32633")
        base = float(np.nanmin(np.where(np.isfinite(z), z, np.nan)))
        s = CreditJob(kind, threshold=thr, threshold_jitter=jitter, weight=weight,
                      connectivity=conn, base=base)
        res = run_ensemble(dem, s, ErrorModel(rmse=0.7, kernel=kernel), realisations=5, seed=1,
                           backend="serial")
    except CairnError:
        assert not np.isfinite(z).any()  # the only expected refusal: no valid cells
        return
    for name, (est, se) in res.layers.items():
        valid = ~dem.nodata
        assert np.all(se[valid] >= 0)
        if name.endswith("probability"):
            assert np.all((est[valid] >= 0) & (est[valid] <= 1))
    w = log_weights(res.log, weight)
    birth_total = res.layers[layer_name(kind, "birth_credit")][0][~dem.nodata].sum() * res.n
    assert birth_total == pytest.approx(w.sum(), rel=1e-9, abs=1e-9)
    features = summarise_features(res)
    write_credit_run(out, res, features, input_path=None, command_line="fuzz")
    table = features.table
    for c in ("p_above", "p_first"):
        assert np.all((table[c] >= 0) & (table[c] <= 1))
    assert np.all(table["se"] >= 0)
