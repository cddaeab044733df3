"""Load a session and look at its stimulus grid
================================================

Load the shipped demo session, check what it holds, and work out where each sparse-noise pixel
lies in the visual field (row 0 is the top of the screen).
"""

from pathlib import Path

from map2d.contract import load_session

DEMO = Path(__file__).resolve().parent.parent / "data_demo"

# Loading validates every file; a defect raises map2d.BadInput naming the file, field and row.
session = load_session(DEMO)
print(f"session {session.name!r}: {session.cell_ids.size} cells ({session.responses.kind})")

# The sparse-noise grid knows the centre of every pixel in degrees.
grid = session.sparse_noise.grid
print(f"grid {grid.ny} x {grid.nx}, spacing {grid.dx_deg} x {grid.dy_deg} deg")
print(f"top-left pixel centre: azimuth {grid.x_deg[0]:.1f} deg, elevation {grid.y_deg[0]:.1f} deg")
print(f"{session.sparse_noise.n_frames} frames, {session.sparse_noise.frame_interval_s * 1000:.0f} ms each")

# Gratings: flashed (tf_hz == 0) and drifting rows.
g = session.gratings
print(f"{int(g.is_static.sum())} flashed presentations, {int(g.is_drifting.sum())} drifting trials, "
      f"phase origin {g.phase_origin_deg} deg")
