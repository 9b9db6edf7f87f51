"""One dot's staircase (a plunger swept against a barrier, or one dot of a pair still empty).

Equally spaced parallel lines of one family: the analysis gives their slope, no second family and
no cell (doubtful: the virtual gates need both dots), and takes none of it for pickup.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
import xarray as xr
from _readout import staircase

from stabtool.analysis import Analyzer


@pytest.mark.regression
@pytest.mark.parametrize(
    "slope_px,spacing_px,family,other",
    [
        # steep: once removed as a plane wave ("straight stripes"), slopes −2.45/−2.47 in two families
        (-2.5, 22.35, "dot1", "dot2"),
        # shallow: once removed as a tone in measurement time, no line found afterwards
        (-0.2, 29.8, "dot2", "dot1"),
    ],
)
def test_one_dots_staircase_gives_its_slope_and_no_second_family(slope_px, spacing_px, family, other):
    v = staircase(slope=slope_px, spacing_px=spacing_px)
    x = np.linspace(0.0, 0.1, v.shape[1])
    y = np.linspace(0.0, 0.08, v.shape[0])
    slope_V = slope_px * (y[1] - y[0]) / (x[1] - x[0])  # the staircase's slope is in pixels
    da = xr.DataArray(v, dims=("PB", "PA"), coords={"PA": x, "PB": y}, name="sensor", attrs={"units": "nA"})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        j = Analyzer()(da).to_json()
    assert j["slopes"][family] == pytest.approx(slope_V, rel=5e-3)
    assert j["slopes"][other] is None and not j["quality"]["ok"]
    assert not any("pickup" in w for w in j["quality"]["warnings"])
