"""Spatial maps from sparse noise, and a model fit
==================================================

Reverse correlation for every cell and lag at once, the responsive call, and a model fit (Gaussian,
difference of Gaussians or Gabor, chosen by BIC) to one cell's map.
"""

from pathlib import Path

import numpy as np
from matplotlib.figure import Figure

from map2d.contract import load_session
from map2d.fit.spatial import fit_map
from map2d.maps import compute_maps

DEMO = Path(__file__).resolve().parent.parent / "data_demo"
session = load_session(DEMO)

# All cells, all lags 0-200 ms; z-scores and a corrected responsive call per cell. The demo holds
# imaging traces: trace_decay="auto" removes each cell's indicator decay first, as map2d maps and
# map2d analyze do (spikes are never filtered).
maps = compute_maps(session.responses, session.sparse_noise, max_lag_s=0.2, n_shuffles=100, rng=0,
                    trace_decay="auto")
print(f"{int(maps.responsive.sum())} of {maps.n_cells} cells responsive")

# The strongest cell: fit its linear map at the peak lag.
c = int(np.nanargmax(np.where(maps.responsive, maps.snr, np.nan)))
lag = int(maps.peak_lag_index[c])
fit = fit_map(maps.linear[c, lag], maps.grid)
print(f"cell {maps.cell_ids[c]}: {maps.polarity[c]}, peak lag {maps.lags_s[lag] * 1000:.0f} ms, "
      f"{fit.model} centred at ({fit.center_x_deg:.1f}, {fit.center_y_deg:.1f}) deg")

# Draw it with row 0 at the top and axes in degrees.
fig = Figure(figsize=(4, 3.2))
ax = fig.add_subplot()
v = np.nanmax(np.abs(maps.linear[c, lag]))
im = ax.imshow(maps.linear[c, lag], extent=maps.grid.extent_deg, origin="upper", cmap="RdBu_r",
               vmin=-v, vmax=v)
ax.plot(fit.center_x_deg, fit.center_y_deg, "k+")
ax.set_xlabel("azimuth (deg)")
ax.set_ylabel("elevation (deg)")
fig.colorbar(im, label=f"linear map ({maps.unit})")
fig.savefig("map_receptive_fields.png", dpi=80)
