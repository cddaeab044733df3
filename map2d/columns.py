"""The column dictionary: every column of ``cells.csv`` with its unit, meaning and source.

One table, many uses: :data:`COLUMNS` is the only place a column is described. ``docs/columns.md``
is generated from it, the report shows :func:`meaning` when the pointer rests on a column, and
``tests/test_columns.py`` fails when ``cells.csv`` holds a column the table lacks or the page is stale.

To add a column: add a :class:`Column` to :data:`COLUMNS` (in the group where it belongs), then
regenerate the page from the repository root::

    python -m map2d.columns            # rewrites docs/columns.md
    python -m map2d.columns --check    # exit 1 if docs/columns.md is stale

Naming rules (tested): every quantity ends in its unit (``_deg``, ``_s``, ``_cpd``, ``_oct``, ``_hz``);
the ends of a 95 % interval are ``<quantity>_ci_low_<unit>`` and ``<quantity>_ci_high_<unit>``; the
half-width of a symmetric interval is ``<quantity>_ci_halfwidth_<unit>`` (``<quantity>_ci_low`` etc. for a
number without unit). Numbers without a unit
(p-values, indices, ratios, scores) and values in the response's own unit (spikes/s, or the traces'
unit, e.g. dF/F) carry no suffix; the table says which.
"""

from __future__ import annotations

import sys
from pathlib import Path
from typing import NamedTuple

__all__ = ["Column", "COLUMNS", "RENAMED", "UNITS", "meaning", "unit", "describe", "markdown",
           "doc_path", "write_doc"]


class Column(NamedTuple):
    """One column of ``cells.csv``.

    ``unit`` is a key of :data:`UNITS`; ``source`` names the paper a method comes from, "common
    practice", or "ours" (a choice made by this project)."""

    name: str
    unit: str
    meaning: str
    source: str = "ours"


#: What the ``unit`` field means.
UNITS = {
    "deg": "degrees (of visual angle, or of angle for orientations and phases)",
    "s": "seconds",
    "deg_s": "degrees of visual angle per second",
    "cpd": "cycles per degree",
    "oct": "octaves",
    "1": "a number without unit (p-value, index, ratio, score)",
    "response": "the response's own unit: spikes/s for spikes, the traces' unit (e.g. dF/F) for traces",
    "id": "an integer cell id",
    "bool": "true / false (empty: cannot be called)",
    "text": "a word or short phrase",
}

_MAP = "Map statistics (sparse noise)"
_FIT = "Spatial fit"
_AGR = "Agreement between map and gratings"
_TUN = "Grating tuning"
_BATCH = "Population table only"

#: Every column, grouped; the first group is the results contract's, in its order.
COLUMNS: tuple[tuple[str, tuple[Column, ...]], ...] = (
    ("Contract columns (always first, in this order)", (
        Column("cell", "id", "Cell id: the integers of the spike file's `cell` array, or the row of the traces "
               "(or its id in `responses.cell_ids`; the ROI id for NWB imaging).", "session format"),
        Column("responsive", "bool", "The sparse-noise map is significant: a max-statistic test over pixels x lags x "
               "map kinds, family-wise alpha 0.01, null from circular-shift shuffles (Gumbel fit to block maxima).",
               "Nichols & Holmes 2002; Coles 2001"),
        Column("center_x_deg", "deg", "Azimuth of the cell's field (positive right): the centre of the fitted "
               "model's envelope when a fit passed its checks, otherwise the |z|-weighted centroid of the "
               "significant cluster (`center_method`; `map2d maps --no-fits`: always the centroid).",
               "common practice"),
        Column("center_y_deg", "deg", "Elevation of the cell's field (positive up), as `center_x_deg`.",
               "common practice"),
        Column("peak_lag_s", "s", "Lag between stimulus and response at which the map's largest |z| lies.",
               "common practice"),
        Column("pref_orientation_deg", "deg", "Preferred orientation, wave-vector angle counter-clockwise from +x, "
               "modulo 180 (0 = vertical stripes); from a von Mises fit on the doubled angle, reported when it beats "
               "a constant (F test p < 0.01) and, for flashed gratings, circular variance <= 0.9.", "common practice"),
        Column("pref_sf_cpd", "cpd", "Preferred spatial frequency, read along the preferred orientation "
               "(model named in `sf_model`).", "common practice"),
        Column("f1_f0", "1", "F1/F0 of drifting-grating responses at the preferred condition (first cycle left "
               "out, F1 with its noise bias removed, the condition chosen on other trials than those it is read "
               "from); > 1 = simple when its interval excludes 1.",
               "Skottun et al. 1991"),
        Column("agreement", "1", "How well the map's fitted model predicts the measured flashed-grating first "
               "harmonics, 0-1, corrected for the noise of the measured surface when it holds signal "
               "(`agreement_noise_corrected`).", "ours; correction: Spearman 1904"),
        Column("linear", "bool", "The cell is linear: agreement >= 0.5 with a non-negative gain, F1/F0 > 1 when "
               "drifting gratings class the cell, ON/OFF overlap <= 0.5; empty when the flashed gratings did not "
               "drive the cell.", "ours; Skottun et al. 1991; Hubel & Wiesel 1962"),
    )),
    (_MAP, (
        Column("linear_reason", "text", "Which criteria decided `linear`, or why it is empty (no map, not "
               "responsive, no flashed gratings, no prediction, no grating response)."),
        Column("p_value", "1", "P-value of the sparse-noise `responsive` test.", "Nichols & Holmes 2002"),
        Column("polarity", "text", "`ON-OFF` (the ON + OFF map carries the cell and both contrasts excite it), "
               "`ON-centre`, `OFF-centre` or `mixed` (ON and OFF both significant, the weaker at least half the "
               "stronger); empty when not responsive."),
        Column("fitted_map", "text", "Which map carries the cell and was fitted: `linear` (ON - OFF) or `on+off` "
               "(bright and dark spots excite the same places: `linear_share` < 0.25 and a significant ON + OFF "
               "map)."),
        Column("onoff_overlap", "1", "Overlap (normalised inner product) of 2-D Gaussians fitted to the strongest "
               "excitatory lobe of the ON and of the OFF map at the peak lag (0 segregated, 1 coextensive; 0 when "
               "only one contrast excites, empty when a subfield fit is not sane; `map2d maps --no-fits`, which fits "
               "nothing: each lobe's Gaussian from the moments of its pixels at half its own maximum).",
               "ours; after Schiller et al. 1976; Mata & Ringach 2005"),
        Column("linear_share", "1", "Share (0-1) of the signal power, noise power subtracted, that the linear map "
               "holds against the ON + OFF map over every pixel and lag where a map passes a Bonferroni-corrected "
               "threshold: near 0 when bright and dark spots excite the same places (complex, ON-OFF), 0.5 for a "
               "half-wave rectified linear cell, near 1 for a linear cell with a maintained discharge."),
        Column("latency_s", "s", "Spikes only: delay from a frame's onset at which the spike-triggered drive "
               "of the cell's own field first reaches half its maximum, at a tenth of a frame's resolution (`peak_lag_s` "
               "is whole frames: lag l counts the response in the window [l T, (l + 1) T) after the onset, so it "
               "understates the latency by up to a frame); empty for traces and cells that are not responsive.",
               "ours; after Chichilnisky 2001"),
        Column("snr", "1", "Largest |z| of the linear map at the peak lag."),
        Column("map_reliability", "1", "Split-half reliability of the space-time map (all pixels and lags; linear map, "
               "or ON + OFF when `fitted_map` is on+off): correlation between the maps of the even and the odd of 16 "
               "blocks of time, Spearman-Brown corrected to the whole session, 2r / (1 + r). Estimates the "
               "correlation with the map of an independent repeat; about 0 for a cell without a field.",
               "Spearman 1910; Brown 1910"),
        Column("map_reliability_ci_low", "1", "Lower end of the 95 % interval of `map_reliability` (jackknife over pairs "
               "of blocks on Fisher's z).", "Efron & Tibshirani 1993"),
        Column("map_reliability_ci_high", "1", "Upper end of the 95 % interval of `map_reliability`.",
               "Efron & Tibshirani 1993"),
        Column("st_separability", "1", "Share of the space-time map's signal power (window around the cell, all "
               "lags) in its first separable component, corrected for noise (spiked-matrix inversion of the top "
               "singular value, noise power removed from the total): near 1 for a space-time separable cell at any "
               "SNR, lower for a tilted (direction-selective) field.", "Benaych-Georges & Nadakuditi 2012"),
        Column("st_inseparable", "bool", "A second space-time component is significant (its singular value "
               "against the largest of pure noise of the same size, level 0.01) and carries at least 15 % of the power "
               "(`st_separability` <= 0.85).", "ours"),
        Column("st_direction_deg", "deg", "Direction of motion the space-time map prefers, 0-360, wave-vector "
               "convention of the drifting gratings (the maximum of the map's predicted drifting-grating response); "
               "inseparable maps only.", "DeAngelis, Ohzawa & Freeman 1993"),
        Column("st_speed_deg_s", "deg_s", "Preferred speed of the inseparable map, deg/s: TF / SF at that maximum, "
               "the map's pixel box and frame blur divided out.", "Adelson & Bergen 1985"),
        Column("st_dsi", "1", "Direction index of the map: (E_pref - E_opp) / (E_pref + E_opp), E the predicted "
               "drifting-grating energy over all SFs and TFs along the preferred axis (0 for separable maps).",
               "ours"),
        Column("st_direction_diff_deg", "deg", "Angle (0-180) between `st_direction_deg` and the drifting "
               "gratings' `pref_direction_deg`, when both exist.", "ours"),
        Column("prediction_r", "1", "Cross-validated correlation between the measured frame responses and a "
               "linear-nonlinear model (ON and OFF maps of the other folds, shrunk by their noise, then a static "
               "nonlinearity from the training decile means), over 4 held-out folds; about 0 without a field.",
               "Chichilnisky 2001"),
        Column("trace_decay_tau_s", "s", "Imaging only: the indicator decay time constant removed from the trace "
               "before the maps.", "Vogelstein et al. 2010"),
        Column("dense_estimate", "text", "Dense (real-valued) noise only: how the linear map was estimated: `sta` "
               "(spike-triggered average) or `whitened` (ridge-regularised whitening; chosen by `--dense-estimate "
               "auto` when the stimulus pixels correlate above 0.05 + 5/sqrt(frames)).",
               "Chichilnisky 2001 (STA); Theunissen et al. 2001 (whitening)"),
        Column("dense_ridge_penalty", "1", "Dense noise, whitened estimate only: the cross-validated ridge penalty "
               "divided by the mean eigenvalue of the stimulus Gram matrix; larger values shrink fine structure "
               "more (a Gabor's SF then reads low).", "Hastie et al. 2009, sections 3.4.1 and 7.10"),
    )),
    (_FIT, (
        Column("model", "text", "The spatial model: the best by BIC among `gaussian`, `dog` and `gabor` that passed "
               "the fit checks (`fit_check`); empty when none did or when not responsive.",
               "Enroth-Cugell & Robson 1966 (DoG); Jones & Palmer 1987 (Gabor)"),
        Column("center_method", "text", "How the centre was found: `model` (an accepted fit's envelope) or `region` "
               "(the |z|-weighted centroid of the map's significant cluster); empty when not responsive."),
        Column("fit_check", "text", "`passed`, or why the best-ranked fit was rejected: `not above noise`, "
               "`explains too little`, `too narrow`, `elongated`, `no carrier`, `centre off the grid`, "
               "`no finite interval`, `centre not determined` (its equal-noise 95 % interval wider than +-1 pixel); empty when "
               "not responsive.", "ours; Wilks 1938 (test against noise)"),
        Column("center_x_ci_low_deg", "deg", "Lower end of the 95 % interval of `center_x_deg` (every fitted "
               "parameter's interval: the fit's heteroscedasticity-consistent sandwich covariance, HC3, never "
               "narrower than the equal-noise one).", "MacKinnon & White 1985; Long & Ervin 2000"),
        Column("center_x_ci_high_deg", "deg", "Upper end of the 95 % interval of `center_x_deg`.", "common practice"),
        Column("center_y_ci_low_deg", "deg", "Lower end of the 95 % interval of `center_y_deg`.", "common practice"),
        Column("center_y_ci_high_deg", "deg", "Upper end of the 95 % interval of `center_y_deg`.", "common practice"),
        Column("size_deg", "deg", "Size of the fitted envelope: geometric mean of its sds (DoG: centre radius / "
               "sqrt 2), with the pixel box removed."),
        Column("fit_sign", "1", "+1 ON, -1 OFF for Gaussian and DoG fits; empty for a Gabor."),
        Column("amplitude", "response", "Amplitude of the Gaussian or Gabor fit (signed for the Gaussian)."),
        Column("sigma_major_deg", "deg", "Envelope sd along its major axis (Gaussian, or the Gabor's envelope)."),
        Column("sigma_minor_deg", "deg", "Envelope sd along its minor axis."),
        Column("theta_deg", "deg", "Angle of the envelope's major axis, counter-clockwise from +x, in [0, 180)."),
        Column("sigma_major_ci_low_deg", "deg", "Lower end of the 95 % interval of `sigma_major_deg`."),
        Column("sigma_major_ci_high_deg", "deg", "Upper end of the 95 % interval of `sigma_major_deg`."),
        Column("sigma_minor_ci_low_deg", "deg", "Lower end of the 95 % interval of `sigma_minor_deg`."),
        Column("sigma_minor_ci_high_deg", "deg", "Upper end of the 95 % interval of `sigma_minor_deg`."),
        Column("theta_ci_low_deg", "deg", "Lower end of the 95 % interval of `theta_deg`."),
        Column("theta_ci_high_deg", "deg", "Upper end of the 95 % interval of `theta_deg`."),
        Column("rc_deg", "deg", "DoG centre radius (1/e).", "Enroth-Cugell & Robson 1966"),
        Column("rs_deg", "deg", "DoG surround radius (1/e).", "Enroth-Cugell & Robson 1966"),
        Column("dog_kc", "response", "DoG centre strength (>= 0 ON centre, <= 0 OFF centre).",
               "Enroth-Cugell & Robson 1966"),
        Column("dog_ks", "response", "DoG surround strength (same sign as `dog_kc`).", "Enroth-Cugell & Robson 1966"),
        Column("rc_ci_low_deg", "deg", "Lower end of the 95 % interval of `rc_deg`."),
        Column("rc_ci_high_deg", "deg", "Upper end of the 95 % interval of `rc_deg`."),
        Column("rs_ci_low_deg", "deg", "Lower end of the 95 % interval of `rs_deg`."),
        Column("rs_ci_high_deg", "deg", "Upper end of the 95 % interval of `rs_deg`."),
        Column("gabor_orientation_deg", "deg", "Gabor wave-vector angle in [0, 180).", "Jones & Palmer 1987"),
        Column("gabor_sf_cpd", "cpd", "Gabor carrier spatial frequency.", "Jones & Palmer 1987"),
        Column("gabor_phase_deg", "deg", "Gabor carrier phase relative to the envelope centre, in [0, 360).",
               "Jones & Palmer 1987"),
        Column("gabor_sigma_u_deg", "deg", "Gabor envelope sd along the wave vector.", "Jones & Palmer 1987"),
        Column("gabor_sigma_v_deg", "deg", "Gabor envelope sd across the wave vector.", "Jones & Palmer 1987"),
        Column("gabor_orientation_ci_low_deg", "deg", "Lower end of the 95 % interval of `gabor_orientation_deg`."),
        Column("gabor_orientation_ci_high_deg", "deg", "Upper end of the 95 % interval of `gabor_orientation_deg`."),
        Column("gabor_sf_ci_low_cpd", "cpd", "Lower end of the 95 % interval of `gabor_sf_cpd`."),
        Column("gabor_sf_ci_high_cpd", "cpd", "Upper end of the 95 % interval of `gabor_sf_cpd`."),
        Column("gabor_phase_ci_low_deg", "deg", "Lower end of the 95 % interval of `gabor_phase_deg`."),
        Column("gabor_phase_ci_high_deg", "deg", "Upper end of the 95 % interval of `gabor_phase_deg`."),
        Column("r2", "1", "Variance of the fitted map explained by the chosen spatial model."),
        Column("aic_gaussian", "1", "Akaike information criterion of the Gaussian fit (empty if not tried).",
               "common practice"),
        Column("aic_dog", "1", "AIC of the DoG fit.", "common practice"),
        Column("aic_gabor", "1", "AIC of the Gabor fit.", "common practice"),
        Column("bic_gaussian", "1", "Bayesian information criterion of the Gaussian fit (lowest BIC chooses "
               "`model`).", "common practice"),
        Column("bic_dog", "1", "BIC of the DoG fit.", "common practice"),
        Column("bic_gabor", "1", "BIC of the Gabor fit.", "common practice"),
    )),
    (_AGR, (
        Column("agreement_raw", "1", "1 - sum|measured - gain x predicted|^2 / sum|measured|^2 over the flashed "
               "orientation x SF conditions, before the noise correction."),
        Column("agreement_noise_corrected", "bool", "`agreement` was corrected for the noise of the measured "
               "surface (it holds power beyond its noise, p < 0.001).", "Spearman 1904"),
        Column("grating_signal_fraction", "1", "Share of the measured grating surface's power that is signal, "
               "1 - noise / total."),
        Column("grating_signal_p_value", "1", "P-value of the measured surface's power against its noise alone; "
               "the null comes from permutations of the grating sequence that redo the choice of the cell's "
               "temporal profile (moments matched to a scaled chi-square).", "Satterthwaite 1946"),
        Column("magnitude_agreement", "1", "Squared correlation of measured and predicted magnitudes |H| "
               "(phases ignored; 0 when the correlation is negative)."),
        Column("phase_error_deg", "deg", "Mean absolute phase difference (0-180) between measured and predicted "
               "first harmonics, weighted by |measured| x |predicted|."),
        Column("agreement_gain", "1", "The real gain fitted between predicted and measured surfaces, with its "
               "sign (grating response per unit of map prediction; negative: opposite signs at the same latency)."),
        Column("time_course_sign", "1", "+1 or -1: the sign that refers the gratings' pattern to the map's latency "
               "(the two time courses compared lag by lag)."),
        Column("inverse_similarity", "1", "Pearson correlation of the map rebuilt from the gratings (inverse Fourier sum) "
               "with the measured map limited to the same band."),
    )),
    (_TUN, (
        Column("grating_responsive", "bool", "The cell responds significantly to flashed or drifting gratings."),
        Column("tuning_source", "text", "Which gratings the orientation and SF tuning come from: `flashed` or "
               "`drifting`."),
        Column("pref_orientation_ci_halfwidth_deg", "deg", "Half-width of the 95 % interval of "
               "`pref_orientation_deg`."),
        Column("orientation_hwhh_deg", "deg", "Orientation tuning half-width at half height (von Mises fit).",
               "common practice"),
        Column("orientation_hwhh_ci_low_deg", "deg", "Lower end of the 95 % interval of `orientation_hwhh_deg` "
               "(the von Mises refitted to resampled data: flashed gratings the presentations of each condition, "
               "drifting gratings the trials of each condition; else from the fit, see `bandwidth_interval_reason`).",
               "Davison & Hinkley 1997"),
        Column("orientation_hwhh_ci_high_deg", "deg", "Upper end of the 95 % interval of `orientation_hwhh_deg`.",
               "Davison & Hinkley 1997"),
        Column("pref_sf_ci_low_cpd", "cpd", "Lower end of the 95 % interval of `pref_sf_cpd`."),
        Column("pref_sf_ci_high_cpd", "cpd", "Upper end of the 95 % interval of `pref_sf_cpd`."),
        Column("sf_bandwidth_oct", "oct", "Full SF bandwidth at half height above the baseline.", "common practice"),
        Column("sf_bandwidth_ci_low_oct", "oct", "Lower end of the 95 % interval of `sf_bandwidth_oct` (flashed "
               "the SF models refitted to resampled data, as `orientation_hwhh_ci_low_deg`, and averaged as the estimate; "
               "else from the fit, see `bandwidth_interval_reason`).", "Davison & Hinkley 1997"),
        Column("sf_bandwidth_ci_high_oct", "oct", "Upper end of the 95 % interval of `sf_bandwidth_oct`.",
               "Davison & Hinkley 1997"),
        Column("bandwidth_interval_reason", "text", "Why the interval of `orientation_hwhh_deg` or `sf_bandwidth_oct` is "
               "empty (too few resampled surfaces gave a finite width: a wider curve than the tested range "
               "measures) or comes from the fit (flashed noise not measured, or drifting gratings with fewer than 2 "
               "trials per condition); empty when both are resampled."),
        Column("circular_variance", "1", "Circular variance of the orientation curve (0 one orientation, 1 untuned; "
               "flashed gratings: the noise floor of |H| removed).",
               "Ringach, Shapley & Hawken 2002"),
        Column("circular_variance_ci_low", "1", "Lower end of the 95 % interval of `circular_variance` "
               "(flashed gratings: the presentations of each condition resampled; drifting gratings: the trials of each "
               "condition resampled).", "Davison & Hinkley 1997"),
        Column("circular_variance_ci_high", "1", "Upper end of the 95 % interval of `circular_variance`.",
               "Davison & Hinkley 1997"),
        Column("osi", "1", "Orientation selectivity index (R_pref - R_orth) / (R_pref + R_orth).",
               "common practice (e.g. Niell & Stryker 2008)"),
        Column("osi_ci_low", "1", "Lower end of the 95 % interval of `osi` (as `circular_variance_ci_low`).",
               "Davison & Hinkley 1997"),
        Column("osi_ci_high", "1", "Upper end of the 95 % interval of `osi`.", "Davison & Hinkley 1997"),
        Column("pref_direction_deg", "deg", "Preferred drift direction in [0, 360) (direction the wave vector "
               "points; two-peaked von Mises fit).", "common practice"),
        Column("dsi", "1", "Direction selectivity index (R_pref - R_opposite) / (R_pref + R_opposite).",
               "common practice"),
        Column("dsi_ci_low", "1", "Lower end of the 95 % interval of `dsi` (trials of both directions resampled).",
               "Davison & Hinkley 1997"),
        Column("dsi_ci_high", "1", "Upper end of the 95 % interval of `dsi`.", "Davison & Hinkley 1997"),
        Column("f1_f0_ci_low", "1", "Lower end of the 95 % bootstrap interval of `f1_f0` (trials resampled, the "
               "choice of the preferred condition redone in each resample).", "Efron & Tibshirani 1993"),
        Column("f1_f0_ci_high", "1", "Upper end of the 95 % bootstrap interval of `f1_f0`.",
               "Efron & Tibshirani 1993"),
        Column("f1_f0_simple_p_value", "1", "Bootstrap p-value of F1/F0 > 1 (share of resamples at or below 1).",
               "Efron & Tibshirani 1993"),
        Column("grating_class", "text", "`simple` when the interval of F1/F0 lies above 1, `complex` when below, "
               "empty otherwise; from drifting gratings.", "Skottun et al. 1991"),
        Column("drift_latency_s", "s", "Drifting gratings: the response latency by which the cell's analysis "
               "windows were shifted (start and end after the stimulus); estimated per cell as the lag, 0-0.3 s, "
               "that maximises the power of its mean drifting response (cells responsive without a shift; 0 for "
               "the others), or set with `--drift-latency`.", "ours; windows shifted by latency: common practice"),
        Column("flashed_peak_lag_s", "s", "Lag of the largest flashed-grating response.",
               "Ringach, Sapiro & Shapley 1997"),
        Column("flashed_p_value", "1", "P-value of the flashed-grating test (shuffled condition sequence, max over "
               "conditions and lags).", "Ringach, Sapiro & Shapley 1997"),
        Column("drifting_p_value", "1", "P-value of the drifting-grating test (F0, F1 and spontaneous tests, "
               "Bonferroni)."),
        Column("ori_fit_baseline", "response", "Baseline b of the orientation fit b + a exp(kappa (cos 2(theta - "
               "theta0) - 1))."),
        Column("ori_fit_amplitude", "response", "Amplitude a of the orientation fit."),
        Column("ori_fit_kappa", "1", "Concentration kappa of the orientation fit."),
        Column("ori_fit_r2", "1", "Variance of the orientation curve explained by the fit."),
        Column("sf_model", "text", "The SF model behind `pref_sf_cpd` and `sf_bandwidth_oct`: `log_gaussian`, "
               "`gaussian`, `dog`, or `average` (Akaike-weighted, no model above weight 0.95).",
               "Akaike weights: common practice"),
        Column("sf_fit_curve", "text", "The one SF curve whose parameters the `sf_fit_*` columns hold "
               "(`log_gaussian`, `gaussian` or `dog`)."),
        Column("sf_fit_baseline", "response", "Baseline of that SF curve (0 for `dog`)."),
        Column("sf_fit_amplitude", "response", "Amplitude of that SF curve (centre strength for `dog`)."),
        Column("sf_fit_sigma_oct", "oct", "Width (sd) of a `log_gaussian` SF curve; empty for the others."),
        Column("sf_fit_sigma_cpd", "cpd", "Width (sd) of a `gaussian` SF curve; empty for the others."),
        Column("sf_fit_rc_deg", "deg", "Centre radius of a `dog` SF curve; empty for the others.",
               "Enroth-Cugell & Robson 1966"),
        Column("sf_fit_r2", "1", "Variance of the SF curve explained by that fit."),
    )),
    ("Local visual angle", (
        Column("size_local_deg", "deg", "`size_deg` in locally isotropic degrees at the centre's elevation e "
               "(azimuth extents scaled by cos e): size_deg x sqrt(cos e).", "common practice (Marshel et al. 2011)"),
        Column("sigma_major_local_deg", "deg", "Envelope major-axis sd in local degrees (covariance J S J, "
               "J = diag(cos e, 1)).", "common practice (Marshel et al. 2011)"),
        Column("sigma_minor_local_deg", "deg", "Envelope minor-axis sd in local degrees.",
               "common practice (Marshel et al. 2011)"),
        Column("theta_local_deg", "deg", "Envelope major-axis angle in local degrees, [0, 180).",
               "common practice (Marshel et al. 2011)"),
        Column("gabor_sf_local_cpd", "cpd", "The Gabor's SF in cycles per local degree (wave vector "
               "(kx / cos e, ky)).", "common practice (Marshel et al. 2011)"),
        Column("gabor_orientation_local_deg", "deg", "The Gabor's wave-vector angle in local degrees, [0, 180).",
               "common practice (Marshel et al. 2011)"),
        Column("pref_sf_local_cpd", "cpd", "`pref_sf_cpd` in cycles per local degree at the map centre.",
               "common practice (Marshel et al. 2011)"),
        Column("pref_orientation_local_deg", "deg", "`pref_orientation_deg` in local degrees at the map centre.",
               "common practice (Marshel et al. 2011)"),
    )),
    (_BATCH, (
        Column("session", "text", "`sessions.csv` of `map2d batch` only: the session's folder name (first column)."),
    )),
)

#: Old name -> new name, for columns renamed so that every quantity carries its unit and intervals
#: are named alike (map2d 0.x -> now). ``sf_fit_width`` became three columns, one per unit.
RENAMED = {
    **{f"{q}_ci_{e}": f"{q}_ci_{e}_{u}" for q, u in (
        ("center_x", "deg"), ("center_y", "deg"), ("sigma_major", "deg"), ("sigma_minor", "deg"),
        ("theta", "deg"), ("rc", "deg"), ("rs", "deg"), ("gabor_orientation", "deg"), ("gabor_sf", "cpd"),
        ("gabor_phase", "deg")) for e in ("low", "high")},
    "pref_orientation_ci95_deg": "pref_orientation_ci_halfwidth_deg",
    "orientation_hwhh_ci95_deg": "orientation_hwhh_ci_low_deg / orientation_hwhh_ci_high_deg",
    "sf_bandwidth_ci95_oct": "sf_bandwidth_ci_low_oct / sf_bandwidth_ci_high_oct",
    "orientation_hwhh_ci_halfwidth_deg": "orientation_hwhh_ci_low_deg / orientation_hwhh_ci_high_deg (now "
                                         "resampled for flashed gratings, not symmetric)",
    "sf_bandwidth_ci_halfwidth_oct": "sf_bandwidth_ci_low_oct / sf_bandwidth_ci_high_oct (now resampled for "
                                     "flashed gratings, not symmetric)",
    "grating_signal_p": "grating_signal_p_value",
    "sf_fit_model": "sf_model",
    "sf_fit_params_model": "sf_fit_curve",
    "sf_fit_width": "sf_fit_sigma_oct / sf_fit_sigma_cpd / sf_fit_rc_deg",
}

_BY_NAME = {c.name: c for _, group in COLUMNS for c in group}


def describe(name: str) -> Column | None:
    """The :class:`Column` called ``name``, or None when the table has no such column."""
    return _BY_NAME.get(name)


def meaning(name: str) -> str:
    """One line for a column: its meaning, then its unit (for hover text); '' for an unknown name.

    Examples
    --------
    >>> meaning("peak_lag_s")
    "Lag between stimulus and response at which the map's largest |z| lies. [s]"
    """
    c = _BY_NAME.get(name)
    if c is None:
        return ""
    return f"{c.meaning} [{c.unit}]" if c.unit not in ("text", "bool", "id") else c.meaning


def unit(name: str) -> str:
    """The unit key of a column (a key of :data:`UNITS`), '' for an unknown name."""
    c = _BY_NAME.get(name)
    return "" if c is None else c.unit


def _cell(text: str) -> str:
    return text.replace("|", "\\|")


def markdown() -> str:
    """``docs/columns.md``: the whole table as Markdown (generated; do not edit the page by hand)."""
    out = ["# Columns of `cells.csv`", "",
           "<!-- generated from map2d/columns.py by `python -m map2d.columns`; do not edit by hand -->", "",
           "`map2d analyze` writes one row per cell, sorted by cell id. A value that cannot be estimated is "
           "empty. `map2d maps` writes the map and fit columns, `map2d gratings` the tuning columns; a session "
           "without one stimulus family leaves that family's columns empty or out. Intervals are 95 %.", "",
           "Units:", ""]
    out += [f"- `{k}`: {v}" for k, v in UNITS.items()]
    for title, group in COLUMNS:
        out += ["", f"## {title}", "", "| column | unit | meaning | source |", "| --- | --- | --- | --- |"]
        out += [f"| `{c.name}` | {c.unit} | {_cell(c.meaning)} | {_cell(c.source)} |" for c in group]
    out += ["", "## Renamed columns", "",
            "Older results used these names; the columns are the same unless said otherwise.", "",
            "| old name | new name |", "| --- | --- |"]
    out += [f"| `{old}` | `{new}` |" for old, new in RENAMED.items()]
    return "\n".join(out) + "\n"


def doc_path() -> Path:
    """Where the generated page lives in a source checkout: ``docs/columns.md``."""
    return Path(__file__).resolve().parents[1] / "docs" / "columns.md"


def write_doc(path=None) -> Path:
    """Write :func:`markdown` to ``path`` (default :func:`doc_path`) and return the path."""
    path = Path(path) if path is not None else doc_path()
    path.write_text(markdown(), encoding="utf-8")
    return path


def _main(argv) -> int:
    if argv[:1] == ["--check"]:
        p = doc_path()
        stale = not p.is_file() or p.read_text(encoding="utf-8") != markdown()
        print(f"{p} is {'stale: run python -m map2d.columns' if stale else 'up to date'}")
        return 1 if stale else 0
    print(f"wrote {write_doc()}")
    return 0


if __name__ == "__main__":
    sys.exit(_main(sys.argv[1:]))
