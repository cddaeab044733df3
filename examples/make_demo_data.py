"""Make the demo session shipped in ``data_demo/``
===================================================

The demo is a simulated two-photon imaging session of our own design: 24 model cells (centre-surround
ON and OFF cells, Gabor simple cells, energy-model complex cells and a few unresponsive ones) imaged at
15 Hz, each answering 15 minutes of sparse noise (20 Hz frames), 6 minutes of flashed gratings and a
block of drifting gratings (4 repeats). A field-of-view label image puts one round ROI per cell, so the field-of-view maps have
something to show. The truth (each cell's model and its true tuning) goes to ``data_demo.truth.json``
beside the folder, never inside it.

Run from the repository root; the same seed writes the same bytes::

    python examples/make_demo_data.py
"""

import json
import shutil
from pathlib import Path

from map2d.contract import write_session
from map2d.simulate import roi_label_image, simulate_session

SEED = 2026
ROOT = Path(__file__).resolve().parent.parent
OUT = ROOT / "data_demo"

session, truth = simulate_session(
    n_cells=24, minutes=15.0, responses="traces", seed=SEED, calcium_tau_s=0.25, noise_sd=0.02,
    flashed_minutes=6.0, repeats=4, peak_rate_hz=(60.0, 120.0), imaging_rate_hz=15.0,
    name="demo: simulated imaging session")
session.rois = roi_label_image(session.cell_ids, shape=(160, 200), radius_px=6.0, rng=SEED)
session.roi_label_offset = 1

if OUT.exists():
    shutil.rmtree(OUT)
write_session(OUT, session)
(ROOT / "data_demo.truth.json").write_text(json.dumps(truth, indent=2, allow_nan=False) + "\n",
                                           encoding="utf-8")
(OUT / "README.md").write_text(__doc__.split("Run from")[0].strip() + "\n\nMade by "
                               "`examples/make_demo_data.py` (seed %d).\n" % SEED, encoding="utf-8")
print(f"wrote {OUT} and {ROOT / 'data_demo.truth.json'}")
