"""The comparison of a live map with the offline one, shared by the live-map tests.

The live sums are float64 and the offline ones float32, so maps are compared to float32 rounding
(relative 1e-5 of the largest map value).
"""

import numpy as np


def assert_maps_equal(live, off):
    assert live is not None
    assert np.array_equal(live.cell_ids, off.cell_ids)
    assert np.array_equal(live.lags_s, off.lags_s)
    for k in ("on", "off", "linear"):
        a, b = live.maps(k), off.maps(k)
        assert np.array_equal(np.isnan(a), np.isnan(b)), k
        scale = float(np.nanmax(np.abs(b)))
        np.testing.assert_allclose(a, b, rtol=0, atol=1e-5 * scale, err_msg=k)
