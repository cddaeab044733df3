"""Held-out validation matrix of the spatial stage: map choice, fit checks and centres on sessions we did
not make with the code under test.

The sessions come from ``tests/heldout_rf.py``, written from the session format alone (it imports nothing
from map2d): eight sparse-noise regimes of what labs meet (little or a lot of maintained discharge, a rectification
threshold, complex and ON-OFF cells, fields within 1.5 deg of the grid's edge, transient (biphasic) cells
at 20 Hz with 4 spots a frame, anisotropic 2.5 x 1.6-deg pixels with 3 spots, imaging with a slow
indicator), each with strong and weak (gain / 2.5) cells and two silent cells. One seed per regime (seed
0, nothing chosen after the fact); ``benchmarks/validate.py`` runs more seeds and writes
``docs/validation.md``.

The yardsticks are the issue's (ours): a third of a pixel for linear cells (at least 0.5 deg), 0.4 pixel
for complex and ON-OFF cells (at least 1 deg), on every regime and every responsive cell; one pixel for
any cell whose strongest map reaches z 6.
Three regimes add flashed gratings for the same cells (4 phases, 8 phases, a phase origin named off the
grid): linear cells must be called linear with a high agreement of the two methods, complex and ON-OFF
cells not, and cells without a grating response get no verdict.
"""

from __future__ import annotations

import numpy as np


def _driven(matrix, regimes=None):
    for name, res in matrix.items():
        if regimes is None or name in regimes:
            for r in res["rows"]:
                if r["cls"] != "none":
                    yield name, res, r


def test_no_cell_with_a_clear_map_is_misplaced_by_more_than_a_pixel(heldout_matrix):
    checked = 0
    for name, _, r in _driven(heldout_matrix):
        if r["responsive"] and r["peak_z"] >= 6:
            checked += 1
            assert r["err_px"] <= 1.0, (name, r)
    assert checked >= 25


def test_linear_cells_within_a_third_of_a_pixel(heldout_matrix):
    # the yardstick (ours), on every regime and every responsive linear cell, weak ones too
    # (seed 0: 0.20 pixel at most for fitted centres). The exception is a centre no model could place
    # (center_method 'region'): a weak Gabor cut by the grid's edge, whose fits' centre intervals span
    # +-1 to +-14 pixels across the cut and whose significant region is one-sided (its side lobe beyond
    # the edge is missing), so its centroid is pulled inward (seed 0: 0.51 pixel, the largest over
    # seeds 0-9, docs/validation.md). Those within 0.6 pixel.
    n = 0
    for name, res, r in _driven(heldout_matrix):
        if r["cls"] == "linear" and r["responsive"]:
            n += 1
            pixel = max(res["spacing"])
            tol = max(pixel / 3, 0.5) if r["center_method"] == "model" else 0.6 * pixel
            assert r["err_deg"] <= tol, (name, r)
    assert n >= 20                               # 23 of the 24 driven linear cells at seed 0


def test_complex_and_on_off_cells_found_on_their_on_plus_off_map(heldout_matrix):
    n = 0
    for name, res, r in _driven(heldout_matrix):
        if r["cls"] in ("complex", "onoff") and not r["weak"]:
            n += 1
            assert r["responsive"], (name, r)
            assert r["fitted_map"] == "on+off" and r["polarity"] == "ON-OFF", (name, r)
            # fitted ON and OFF subfields coincide (measured 0.70-0.98)
            assert r["overlap"] >= 0.6, (name, r)
        if r["cls"] in ("complex", "onoff") and r["responsive"]:
            # the yardstick for every responsive one, weak ones too
            pixel = max(res["spacing"])
            assert r["err_deg"] <= max(0.4 * pixel, 1.0), (name, r)
    assert n >= 6


def test_linear_cells_never_located_on_the_on_plus_off_map(heldout_matrix):
    for name, _, r in _driven(heldout_matrix):
        if r["cls"] == "linear" and r["responsive"]:
            assert r["fitted_map"] == "linear" and r["polarity"] != "ON-OFF", (name, r)
            # segregated subfields (a transient cell's rebound excites the other contrast at the same
            # place one frame later: measured up to 0.6 there)
            if name != "biphasic":
                assert not r["overlap"] > 0.5, (name, r)


def test_silent_cells_false_positives_within_alpha(heldout_matrix):
    silent = [r for res in heldout_matrix.values() for r in res["rows"] if r["cls"] == "none"]
    alpha = next(iter(heldout_matrix.values()))["alpha"]
    fp = sum(r["responsive"] for r in silent)
    # 22 silent cells (2 a regime) at alpha 0.01: P(2 or more false positives) = 2.0 % (binomial)
    assert len(silent) == 2 * len(heldout_matrix) == 22 and fp <= 1, fp
    assert alpha == 0.01


def test_strong_cells_found(heldout_matrix):
    for name, _, r in _driven(heldout_matrix):
        if not r["weak"]:
            assert r["responsive"], (name, r)


def test_centre_method_says_how_the_centre_was_found(heldout_matrix):
    seen = set()
    for name, _, r in _driven(heldout_matrix):
        if r["responsive"]:
            assert r["center_method"] in ("model", "region"), (name, r)
            seen.add(r["center_method"])
            # no fitted size without an accepted model
            if r["center_method"] == "region":
                assert not r["model"] and np.isnan(r["size_err"]), (name, r)
        else:
            assert r["center_method"] == "" and np.isnan(r["err_deg"]), (name, r)
    assert "model" in seen


def test_latency_at_sub_frame_resolution_for_spikes(heldout_matrix):
    # the generator's cells respond from LATENCY after a frame's onset for one frame; peak_lag_s is the
    # start of the frame-long window holding most of the response, latency_s the delay itself
    # (measured, seeds 0-1: within 0.008 s of 0.045 s at 10 Hz and of 0.03 s at 20 Hz for cells of z >= 7;
    # an ON-OFF cell of z 6.9 read 0.032 s late). Tolerance ours: a quarter of a frame from z 8, half
    # a frame from z 6.
    n = 0
    for name, res in heldout_matrix.items():
        for r in res["rows"]:
            if r["cls"] == "none" or not r["responsive"]:
                continue
            if not res["spikes"]:
                assert np.isnan(r["latency_s"]), (name, r)        # traces: no spike times
                continue
            # the whole-frame lag is within a frame of the latency, never after it
            assert r["peak_lag_s"] - 1e-9 <= res["latency_s"] + res["frame_s"], (name, r)
            if r["peak_z"] >= 6:
                n += 1
                tol = (0.25 if r["peak_z"] >= 8 else 0.5) * res["frame_s"]
                assert abs(r["latency_s"] - res["latency_s"]) <= tol, (name, r)
    assert n >= 20


# ------------------------------------------------------------------------------------------------
# flashed gratings for the same cells (issue 13 item 6: 4 and 8 phases, a phase origin off the centre)
# ------------------------------------------------------------------------------------------------
def _with_gratings(matrix):
    for name, res in matrix.items():
        if res["gratings"]:
            for r in res["rows"]:
                yield name, res, r


def test_grating_regimes_present(heldout_matrix):
    assert sorted(n for n, res in heldout_matrix.items() if res["gratings"]) == [
        "gratings, 4 phases", "gratings, 8 phases", "gratings, origin off centre"]


def test_linear_cells_called_linear_with_high_agreement(heldout_matrix):
    # the map's prediction of the flashed gratings' first harmonics (reconcile): median agreement of the
    # linear cells 0.9 or more in each regime (the bar of the held-out mouse-design test, issue 14),
    # none below 0.75 (threshold of the call 0.5). Measured, seed 0: 0.87-1.00 (medians 0.98, 0.99, 0.99)
    agreement = {}
    for name, _, r in _with_gratings(heldout_matrix):
        if r["cls"] == "linear" and r["sees_gratings"]:
            assert r["responsive"] and r["linear"] is True, (name, r)
            agreement.setdefault(name, []).append(r["agreement"])
    assert len(agreement) == 3
    for name, a in agreement.items():
        assert len(a) == 4 and np.median(a) >= 0.9 and min(a) >= 0.75, (name, a)


def test_complex_and_on_off_cells_not_called_linear(heldout_matrix):
    # an energy cell's and an ON-OFF cell's flashed responses carry no first harmonic (phase-invariant,
    # frequency-doubled): measured agreement 0.00-0.06
    n = 0
    for name, _, r in _with_gratings(heldout_matrix):
        if r["cls"] in ("complex", "onoff"):
            n += 1
            assert r["responsive"] and r["linear"] is False, (name, r)
            assert r["agreement"] < 0.5, (name, r)
    assert n == 6


def test_no_linearity_verdict_without_a_grating_response(heldout_matrix):
    # silent cells, and a cell whose map is clear but which was lost before the gratings
    lost = 0
    for name, _, r in _with_gratings(heldout_matrix):
        if not r["sees_gratings"]:
            assert r["linear"] is None, (name, r)
            if r["cls"] != "none":
                lost += 1
                assert r["responsive"] and "no grating response" in r["linear_reason"], (name, r)
    assert lost == 3


def test_grating_regimes_centres_within_the_yardsticks(heldout_matrix):
    # every responsive driven cell of these regimes, weak ones included (measured, seed 0: 0.18 pixel
    # at most)
    for name, res, r in _with_gratings(heldout_matrix):
        if r["cls"] != "none" and r["responsive"]:
            pixel = max(res["spacing"])
            tol = max(pixel / 3, 0.5) if r["cls"] == "linear" else max(0.4 * pixel, 1.0)
            assert r["err_deg"] <= tol, (name, r)


def test_origin_regime_rests_on_the_named_origin(tmp_path):
    # negative control: the origin regime's session with the manifest's phase origin left out, so that
    # it is read as the grid centre, 25 deg from where the gratings' phases were drawn: the linear
    # cells' phases no longer match the maps' predictions (measured, seed 0: agreement 0.00-0.19, none
    # called linear, against 0.95-1.00 with the origin named)
    import json
    import sys
    import warnings
    from pathlib import Path

    from map2d.analysis import analyze_session
    from map2d.contract import load_session

    sys.path.insert(0, str(Path(__file__).parent))
    import heldout_rf

    truth = heldout_rf.make_session(tmp_path, heldout_rf.REGIMES["gratings, origin off centre"], seed=0)
    manifest = json.loads((tmp_path / "session.json").read_text())
    del manifest["gratings"]["phase_origin_deg"]
    (tmp_path / "session.json").write_text(json.dumps(manifest))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        an = analyze_session(load_session(tmp_path), rng=0)
    lin = [i for i, c in enumerate(truth["cells"]) if heldout_rf.cell_class(c) == "linear"
           and not c.get("lost_in_gratings")]
    agreement = np.asarray(an.cells["agreement"], float)[lin]
    assert np.median(agreement) < 0.5, agreement


# --- the centre intervals' coverage ------------------------------------------------------------------

#: Nominal joint coverage of a 95 % centre box (x and y intervals): at least 0.95^2 (Sidak's inequality
#: for the two axes' errors, whatever their correlation).
BOX = 0.95 ** 2


def _box_hits(fields, cells, ids):
    """(cells, boxes covering the true centre) among ``ids`` whose centre came from an accepted fit."""
    n = hits = 0
    for i in ids:
        if fields["center_method"][i] != "model":
            continue
        n += 1
        c = cells[i]
        hits += bool(fields["center_x_ci_low_deg"][i] <= c["cx"] <= fields["center_x_ci_high_deg"][i]
                     and fields["center_y_ci_low_deg"][i] <= c["cy"] <= fields["center_y_ci_high_deg"][i])
    return n, hits


def _heldout_rf():
    import sys
    from pathlib import Path
    sys.path.insert(0, str(Path(__file__).parent))
    import heldout_rf
    return heldout_rf


def test_centre_intervals_cover_the_truth_at_their_nominal_rate(heldout_matrix):
    # every responsive driven cell with a fitted centre, every regime at seed 0: the count of 95 % centre
    # boxes holding the true centre is not below the binomial's 0.001 quantile at the nominal rate.
    # The intervals come from the HC3 sandwich covariance (MacKinnon & White 1985; Long & Ervin 2000);
    # measured at seed 0: 47 of 48 (equal-noise Wald: 42); over seeds 0-9 (benchmarks/centre_errors.py)
    # 0.93 (Wald 0.78)
    from scipy.stats import binom
    hr = _heldout_rf()
    n = hits = 0
    for name, res in heldout_matrix.items():
        ids = [r["id"] for r in res["rows"] if r["cls"] != "none" and r["responsive"]]
        a, b = _box_hits(res["fields"], hr.REGIMES[name]["cells"], ids)
        n, hits = n + a, hits + b
    assert n >= 40
    assert hits >= binom.ppf(0.001, n, BOX), (hits, n)


def test_centre_intervals_cover_the_truth_where_the_noise_is_unequal(tmp_path_factory):
    # the regimes where a map's noise is least equal across pixels: rectified cells with a threshold
    # (their noise is almost all on the field) and fields cut by the grid's edge, seeds 1-6 (seed 0 is
    # the matrix's). The equal-noise Wald boxes covered 15 of 29 here (0.52; the binomial bound is 20);
    # HC3's 26 of 29 (measured)
    import warnings

    from scipy.stats import binom

    from map2d.contract import load_session
    from map2d.fit.spatial import locate_fields
    from map2d.maps import compute_maps
    hr = _heldout_rf()
    root = tmp_path_factory.mktemp("heldout_unequal")
    n = hits = 0
    for name in ("threshold", "edge"):
        for seed in range(1, 7):
            folder = root / f"{name}_{seed}"
            truth = hr.make_session(folder, hr.REGIMES[name], seed)
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                s = load_session(folder)
                maps = compute_maps(s.responses, s.sparse_noise, max_lag_s=0.2, rng=np.random.default_rng(0))
                fields = locate_fields(maps)
            ids = [i for i, c in enumerate(truth["cells"]) if hr.cell_class(c) != "none" and maps.responsive[i]]
            a, b = _box_hits(fields.columns, truth["cells"], ids)
            n, hits = n + a, hits + b
    assert n >= 20
    assert hits >= binom.ppf(0.001, n, BOX), (hits, n)
