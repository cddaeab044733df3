"""`map2d demo` end to end: the README's main-job command."""

import csv
import json
import math
from pathlib import Path

import numpy as np
import tifffile

from map2d.cli import main

ROOT = Path(__file__).resolve().parent.parent
CONTRACT = ["cell", "responsive", "center_x_deg", "center_y_deg", "peak_lag_s", "pref_orientation_deg",
            "pref_sf_cpd", "f1_f0", "agreement", "linear"]


def test_demo_writes_a_complete_results_folder(tmp_path, capsys):
    out = tmp_path / "demo"
    assert main(["demo", "--out", str(out), "--quiet"]) == 0
    printed = capsys.readouterr().out
    assert str(out / "report.html") in printed          # says where the report is
    for name in ("cells.csv", "maps.tif", "maps.ome.tif", "results.npz", "report.html", "fov.tif"):
        assert (out / name).is_file(), name
    rows = list(csv.DictReader(open(out / "cells.csv", encoding="utf-8")))
    assert list(rows[0])[:len(CONTRACT)] == CONTRACT      # contract columns first, in order
    assert [int(r["cell"]) for r in rows] == list(range(24))
    truth = json.loads((ROOT / "data_demo.truth.json").read_text())["cells"]
    # no unresponsive model cell is called responsive; empty values stay empty
    for r, t in zip(rows, truth):
        if t["kind"] == "unresponsive":
            assert r["responsive"] == "false"
            assert r["center_x_deg"] == "" and r["agreement"] == "" and r["linear"] == ""
    # centre-surround cells that were found sit where the simulator put them (within 1 deg)
    for r, t in zip(rows, truth):
        if t["kind"] in ("on_dog", "off_dog") and r["responsive"] == "true":
            err = math.hypot(float(r["center_x_deg"]) - t["center_x_deg"],
                             float(r["center_y_deg"]) - t["center_y_deg"])
            assert err < 1.0, (r["cell"], err)
    with tifffile.TiffFile(out / "maps.tif") as tif:
        assert tif.series[0].axes == "TZCYX"
        assert tif.series[0].shape[1:3] == (24, 3)
    html = (out / "report.html").read_text(encoding="utf-8")
    assert all(f'id="cell-{int(r["cell"])}"' in html for r in rows)      # every cell reachable
    assert 'id="m2d-cells"' in html and 'id="fov-map"' in html
    fov = tifffile.imread(out / "fov.tif")
    assert np.isnan(fov[0, 0, 0])                          # background is NaN
