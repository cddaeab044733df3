"""Command line: argument parsing only. Every command calls a function of the library.

Exit codes: 0 ok, 1 internal error, 2 bad input or a refusal of the machine (full disk, missing
permission; the path is named), 130 interrupted (Ctrl-C), 143 stopped by SIGTERM.
"""

from __future__ import annotations

import argparse
import contextlib
import io
import re
import signal
import sys
import warnings
from pathlib import Path

class _ArgumentError(Exception):
    """An argument argparse cannot accept (one line, exit 2, like every bad input)."""


class _Parser(argparse.ArgumentParser):
    """Errors raise (exit 2 with one line); help shows every default (:class:`_HelpFormatter`)."""

    def __init__(self, *args, **kwargs):
        kwargs.setdefault("formatter_class", _HelpFormatter)
        super().__init__(*args, **kwargs)

    def error(self, message):
        raise _ArgumentError(f"{self.prog}: {message}")


#: Longest lag (s) any command accepts: far beyond any visual latency; a longer one is a units mistake.
MAX_LAG_S = 10.0
#: Seeds: what numpy's generators take, within a signed 64-bit integer.
MAX_SEED = 2 ** 63 - 1


def _number(lo, hi, integer=False, above=False):
    """An argparse type: a number in plain decimal or exponent notation
    (:func:`map2d.contract.parse_number`), whole when ``integer``, within ``lo`` .. ``hi`` (``lo``
    excluded when ``above``); the message names the bound."""
    def parse(text):
        from .contract import parse_number
        try:
            v = parse_number(text)
        except ValueError as exc:
            raise argparse.ArgumentTypeError(str(exc)) from None
        if integer:
            if v != int(v) or not re.fullmatch(r"\s*[+-]?[0-9]+\s*", str(text)):
                raise argparse.ArgumentTypeError(f"'{text}' is not a whole number")
            v = int(str(text).strip())
        if not ((v > lo if above else v >= lo) and v <= hi):
            low, high = (f"{b}" if integer else f"{b:g}" for b in (lo, hi))
            raise argparse.ArgumentTypeError(f"{text.strip()} is outside {'(' if above else '['}{low}, {high}]")
        return v
    parse.__name__ = "integer" if integer else "number"
    return parse


_SEED = _number(0, MAX_SEED, integer=True)
_LAG = _number(0.0, MAX_LAG_S)
_ANGLE = _number(-360.0, 360.0)
_COUNT = _number(1, 10 ** 6, integer=True)


CAUTION = ("Caution: flashing and high-contrast patterns can trigger seizures in photosensitive people. "
           "Follow local guidance and your local animal-care approvals when presenting these stimuli.")


class _HelpFormatter(argparse.HelpFormatter):
    """Every option's help ends with its default (unless the text already gives it)."""

    def _get_help_string(self, action):
        text = action.help or ""
        if ("default" in text or not action.option_strings or action.required or action.default is argparse.SUPPRESS
                or isinstance(action, (argparse._StoreTrueAction, argparse._HelpAction, argparse._VersionAction))):
            return text
        d = action.default
        shown = "none" if d is None else " ".join(map(str, d)) if isinstance(d, (list, tuple)) else "%(default)s"
        return f"{text} (default {shown})"


def _add_common(p):
    p.add_argument("--debug", action="store_true", help="show the full traceback of any error")
    p.add_argument("--quiet", action="store_true", help="no progress bars or progress messages")


def build_parser() -> argparse.ArgumentParser:
    from . import __version__

    parser = _Parser(
        prog="map2d",
        description="Map 2-D receptive fields from sparse noise and gratings, and check that the two agree.")
    parser.add_argument("--version", action="version", version=f"map2d {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")

    # -- stimulus ---------------------------------------------------------------------------------
    p_stim = sub.add_parser("stimulus", help="generate stimulus files for presentation",
                            description="Generate seeded, reproducible stimulus files. " + CAUTION)
    stim_sub = p_stim.add_subparsers(dest="stimulus_kind", metavar="KIND")
    sn = stim_sub.add_parser("sparse-noise", help="bright and dark spots on a grid",
                             description="Sparse noise: a few bright and dark spots per frame on a grid. " + CAUTION)
    sn.add_argument("--out", required=True, type=Path,
                    help="folder to add sparse_noise.npy and its times to (other stimulus files are kept)")
    sn.add_argument("--ny", type=_number(1, 4096, integer=True), default=16, help="grid rows (default 16)")
    sn.add_argument("--nx", type=_number(1, 4096, integer=True), default=24, help="grid columns (default 24)")
    sn.add_argument("--spacing-deg", type=_number(1e-4, 180.0), nargs=2, default=(2.0, 2.0), metavar=("DX", "DY"),
                    help="pixel spacing in degrees (default 2 2)")
    sn.add_argument("--center-deg", type=_ANGLE, nargs=2, default=(0.0, 0.0), metavar=("X", "Y"),
                    help="grid centre azimuth and elevation in degrees (default 0 0)")
    sn.add_argument("--spots", type=_number(1, 10 ** 4, integer=True), default=4, help="spots per frame (default 4)")
    sn.add_argument("--min-distance-deg", type=_number(0.0, 360.0), default=5.0,
                    help="minimum distance between spots in one frame, degrees (default 5)")
    sn.add_argument("--rate-hz", type=_number(0.0, 1000.0, above=True), default=20.0,
                    help="frames per second (default 20)")
    sn.add_argument("--minutes", type=_number(0.0, 10080.0, above=True), default=10.0,
                    help="duration in minutes (default 10)")
    sn.add_argument("--start-s", type=_number(0.0, 1e10), default=0.0,
                    help="onset of the first frame in seconds (default 0)")
    sn.add_argument("--seed", type=_SEED, default=0, help="random seed (default 0)")
    sn.add_argument("--overwrite", action="store_true",
                    help="replace the sparse noise (and frames.tif) already in --out (default: refuse)")
    _add_render_args(sn)
    _add_common(sn)

    gr = stim_sub.add_parser("gratings", help="flashed or drifting sinusoidal gratings",
                             description="Gratings: a flashed sequence (one grating per frame, random "
                                         "orientation x SF x phase) or drifting trials. " + CAUTION)
    gr.add_argument("--out", required=True, type=Path,
                    help="folder whose gratings.csv the presentations are appended to (created if absent)")
    gr.add_argument("--mode", choices=("flashed", "drifting"), default="flashed",
                    help="flashed sequence or drifting trials (default flashed)")
    gr.add_argument("--orientations", type=_number(1, 3600, integer=True), default=12,
                    help="number of orientations over 0-180 (flashed) or directions over 0-360 (drifting)")
    gr.add_argument("--sf-cpd", type=_number(1e-4, 100.0), nargs="+", default=(0.02, 0.04, 0.08, 0.16, 0.32),
                    help="spatial frequencies in cycles/deg")
    gr.add_argument("--phases", type=_number(1, 3600, integer=True), default=4,
                    help="phases per grating, flashed mode (default 4)")
    gr.add_argument("--blank-fraction", type=_number(0.0, 1.0), default=0.1,
                    help="fraction of blank frames, flashed mode")
    gr.add_argument("--contrast", type=_number(0.0, 1.0), default=1.0, help="Michelson contrast (default 1)")
    gr.add_argument("--rate-hz", type=_number(0.0, 1000.0, above=True), default=10.0,
                    help="frames per second, flashed mode (default 10)")
    gr.add_argument("--minutes", type=_number(0.0, 10080.0, above=True), default=10.0,
                    help="duration, flashed mode (default 10)")
    gr.add_argument("--tf-hz", type=_number(0.0, 1000.0), default=2.0,
                    help="temporal frequency, drifting mode (default 2)")
    gr.add_argument("--duration-s", type=_number(0.0, 86400.0, above=True), default=2.0,
                    help="trial duration, drifting mode (default 2)")
    gr.add_argument("--gap-s", type=_number(0.0, 86400.0), default=1.0,
                    help="gap between trials, drifting mode (default 1)")
    gr.add_argument("--repeats", type=_number(1, 10 ** 5, integer=True), default=5,
                    help="repeats per condition, drifting mode (default 5)")
    gr.add_argument("--start-s", type=_number(0.0, 1e10), default=0.0,
                    help="onset of the first presentation (default 0)")
    gr.add_argument("--phase-origin-deg", type=_ANGLE, nargs=2, default=(0.0, 0.0), metavar=("X", "Y"),
                    help="phase origin (xc, yc) in degrees (default 0 0)")
    gr.add_argument("--aperture-deg", type=_ANGLE, nargs=3, default=None, metavar=("X", "Y", "DIAMETER"),
                    help="show the gratings only in this circle (centre azimuth, elevation and diameter in "
                         "degrees; grey outside) when rendering; stored in stimulus.json (default: full screen)")
    gr.add_argument("--seed", type=_SEED, default=0, help="random seed (default 0)")
    gr.add_argument("--overwrite", action="store_true",
                    help="replace gratings.csv (and frames.tif) in --out instead of appending to it "
                         "(default: append, refuse to replace frames.tif)")
    _add_render_args(gr)
    _add_common(gr)

    # -- simulate ---------------------------------------------------------------------------------
    sim = sub.add_parser("simulate", help="write a simulated session with known answers",
                         description="Simulate model cells (DoG, Gabor simple, energy complex, unresponsive) "
                                     "answering sparse noise and gratings; writes a session folder and "
                                     "OUT.truth.json beside it.")
    sim.add_argument("out", type=Path, help="session folder to create")
    sim.add_argument("--seed", type=_SEED, default=0, help="random seed (default 0)")
    sim.add_argument("--cells", type=_number(-10 ** 6, 10 ** 5, integer=True), default=20,
                     help="number of cells (default 20)")
    sim.add_argument("--minutes", type=_number(-1e4, 10080.0), default=20.0,
                     help="sparse-noise duration in minutes (default 20)")
    sim.add_argument("--responses", choices=("spikes", "traces"), default="spikes",
                     help="electrophysiology spikes or imaging traces (default spikes)")
    sim.add_argument("--overwrite", action="store_true", help="replace an existing session folder")
    _add_common(sim)

    # -- assemble ---------------------------------------------------------------------------------
    asm = sub.add_parser("assemble", help="make a session from stimulus files, a recording and measured frame times",
                         description="Turn a folder written by map2d stimulus into a session: add the spikes or "
                                     "traces and, from the measured onsets of the displayed frames, the times on "
                                     "the recording's clock (clock offset and drift fitted; late, dropped or "
                                     "untimed frames and extra pulses found). Writes session.json with a timing "
                                     "summary; the nominal files are kept (docs/session-format.md).")
    asm.add_argument("folder", type=Path, metavar="DIR", help="stimulus folder (holding stimulus.json)")
    asm.add_argument("--spikes", type=Path, default=None,
                     help=".npz with time_s and cell, or a CSV/TSV of time (s) and cell (default: none)")
    asm.add_argument("--traces", type=Path, default=None, help=".npy, cells x samples (default: none)")
    asm.add_argument("--trace-times", type=Path, default=None,
                     help="sample times (s) of --traces: .npy or one number per line (default: none)")
    asm.add_argument("--frame-times", type=Path, default=None,
                     help="measured onset (s, recording clock) of every displayed frame and grating "
                          "presentation: .npy or one number per line (default: none, the nominal times are used "
                          "as they are)")
    asm.add_argument("--rois", type=Path, default=None, help="ROI label image, label = cell id + 1 (default: none)")
    asm.add_argument("--name", default=None, help="session name (default: the folder name)")
    asm.add_argument("--overwrite", action="store_true", help="replace a session already assembled in DIR")
    _add_common(asm)

    # -- analysis ---------------------------------------------------------------------------------
    for name, helptext in (("maps", "spatial maps from sparse noise"),
                           ("gratings", "grating response surfaces and tuning"),
                           ("analyze", "maps, gratings, reconciliation, TIFF stacks and report")):
        p = sub.add_parser(name, help=helptext, description=f"Compute {helptext} for every cell of a session.")
        p.add_argument("session", type=Path, help="session folder (holding session.json), or an .nwb file "
                                                      "with --config")
        p.add_argument("--out", required=True, type=Path, help="results folder (replaced only after success)")
        p.add_argument("--max-lag", type=_LAG, default=0.2, dest="max_lag_s",
                       help="longest lag in seconds (default 0.2)")
        p.add_argument("--seed", type=_SEED, default=0, help="seed for shuffles and bootstraps (default 0)")
        if name in ("maps", "gratings", "analyze"):
            p.add_argument("--trace-decay", default="auto", dest="trace_decay", metavar="auto|off|SECONDS",
                           help="imaging traces: remove the indicator's decay before the maps and gratings, with the "
                                "time constant estimated per cell (auto, the default), given in seconds, "
                                "or not at all (off); spikes are never filtered")
        p.add_argument("--config", type=Path, default=None,
                       help="NWB mapping (JSON) when SESSION is an .nwb file (README, NWB files and many "
                            "sessions; docs/batch.md)")
        if name in ("gratings", "analyze"):
            p.add_argument("--drift-latency", default="auto", dest="drift_latency", metavar="auto|SECONDS",
                           help="drifting gratings: shift each cell's analysis windows by its response "
                                "latency, estimated per cell from its drifting responses (auto, the "
                                "default), or by the same number of seconds for every cell (0: no shift)")
        if name in ("maps", "analyze"):
            p.add_argument("--dense-estimate", default="auto", choices=("auto", "sta", "whitened"),
                           dest="dense_estimate",
                           help="dense (real-valued) noise: the linear map's estimate: the spike-triggered "
                                "average (sta), the ridge-whitened estimate (whitened), or whitened when "
                                "the stimulus pixels correlate (auto, the default); named in cells.csv")
        if name == "maps":
            p.add_argument("--no-fits", action="store_true",
                           help="maps and significance only: no model fits (centre = centroid of the "
                                "significant region)")
        _add_common(p)

    # -- batch ------------------------------------------------------------------------------------
    bat = sub.add_parser("batch", help="analyze many sessions, on a Dask cluster or in process",
                         description="Run analyze on every SESSION (session folders, .nwb files, or folders "
                                     "holding them) and write DIR/<session>/, DIR/sessions.csv (all cells, "
                                     "with a session column), DIR/population.png and DIR/batch.csv. Exit code "
                                     "0 if all succeeded, 2 if the failures were all bad input, else 1.")
    bat.add_argument("sessions", nargs="+", type=Path, metavar="SESSION", help="session folders or .nwb files")
    bat.add_argument("--out", required=True, type=Path, help="batch results folder")
    bat.add_argument("--scheduler", default=None,
                     help="tcp://HOST:PORT of a running dask scheduler, or sync to run here without Dask "
                          "(default: an embedded local cluster)")
    bat.add_argument("--workers", type=_number(1, 1024, integer=True), default=2,
                     help="workers of the embedded local cluster (default 2)")
    bat.add_argument("--memory-limit", default="10GB",
                     help="memory limit per worker of the embedded local cluster (default 10GB)")
    bat.add_argument("--config", type=Path, default=None, help="NWB mapping (JSON) for every .nwb SESSION")
    bat.add_argument("--max-lag", type=_LAG, default=0.2, dest="max_lag_s",
                     help="longest lag in seconds (default 0.2)")
    bat.add_argument("--seed", type=_SEED, default=0, help="seed for shuffles and bootstraps (default 0)")
    bat.add_argument("--trace-decay", default="auto", dest="trace_decay", metavar="auto|off|SECONDS",
                     help="imaging traces: remove the indicator's decay before the maps (as for analyze)")
    bat.add_argument("--dense-estimate", default="auto", choices=("auto", "sta", "whitened"),
                     dest="dense_estimate", help="dense noise: the linear map's estimate (as for analyze)")
    bat.add_argument("--no-report", action="store_true",
                     help="leave report.html out of each session's folder (faster; tables, stacks and arrays "
                          "are still written)")
    _add_common(bat)

    # -- live ------------------------------------------------------------------------------------
    w = sub.add_parser("watch", help="live maps while a recording appends to a session folder",
                       description="Follow DIR (sparse noise written by map2d stimulus; frame_times.txt and "
                                   "spikes.txt or traces.txt appended by the recording, formats in docs/live.md), update "
                                   "every cell's maps as data arrive, show them in DIR/live.html (reloads "
                                   "itself) and in the terminal, and suggest a grating aperture. When no data "
                                   "arrive for --idle-s seconds (or on Ctrl-C) write the session into DIR and "
                                   "the offline maps (as map2d maps) into --out.")
    w.add_argument("folder", type=Path, metavar="DIR", help="the folder the recording writes into")
    w.add_argument("--out", type=Path, default=None, help="results folder for the final maps (default DIR/maps)")
    w.add_argument("--page", type=Path, default=None, help="live page (default DIR/live.html)")
    w.add_argument("--max-lag", type=_LAG, default=0.2, dest="max_lag_s", help="longest lag in seconds (default 0.2)")
    w.add_argument("--idle-s", type=_number(0.0, 1e7), default=60.0,
                   help="end after this many seconds without data (default 60)")
    w.add_argument("--poll-s", type=_number(0.0, 3600.0, above=True), default=0.5,
                   help="seconds between reads of the files (default 0.5)")
    w.add_argument("--refresh-s", type=_number(0.0, 1e7), default=2.0, help="seconds between page updates (default 2)")
    w.add_argument("--summary-s", type=_number(0.0, 1e7), default=10.0,
                   help="seconds between terminal lines (default 10)")
    w.add_argument("--cells", type=_number(-2 ** 53, 2 ** 53, integer=True), nargs="+", default=None, metavar="ID",
                   help="cells whose fields the aperture covers (default: every responsive cell)")
    w.add_argument("--seed", type=_SEED, default=0, help="seed for the final shuffles (default 0)")
    w.add_argument("--no-fits", action="store_true", help="final maps without model fits (faster)")
    w.add_argument("--trace-decay", default="auto", dest="trace_decay", metavar="off|SECONDS",
                   help="imaging traces (traces.txt): the indicator's decay time constant to remove live, or "
                        "off; 'auto' (estimated from the whole trace) cannot run live and is refused")
    _add_common(w)
    rp = sub.add_parser("replay", help="write a session into a folder as a recording would (tests, demos)",
                        description="Write SESSION's sparse noise into DIR, then append its frame onsets and "
                                    "spikes (or trace samples) to DIR/frame_times.txt and DIR/spikes.txt (or "
                                    "DIR/traces.txt) at --speed times real time.")
    rp.add_argument("session", type=Path, help="session folder with sparse noise and spikes or traces")
    rp.add_argument("folder", type=Path, metavar="DIR", help="folder to write into (created)")
    rp.add_argument("--speed", type=float, default=1.0, help="times real time (default 1; inf = at once)")
    rp.add_argument("--seconds", type=float, default=None, help="replay only this much recording time")
    _add_common(rp)
    # -- plan -------------------------------------------------------------------------------------
    pl = sub.add_parser("plan", help="minutes of sparse noise (and flashed presentations) a cell needs",
                        description="Without SESSION: predict the map's peak z and centre precision of a cell "
                                    "after --minutes of a sparse-noise protocol, and the minutes for --target-z "
                                    "(and --target-center-deg). With SESSION: per cell and for the population, "
                                    "the minutes still needed to reach --target-z (and with --target-snr the "
                                    "flashed-grating presentations per condition). How: README, map2d plan.")
    pl.add_argument("session", type=Path, nargs="?", default=None,
                    help="a recorded session folder (optional)")
    pl.add_argument("--target-z", type=float, default=8.0, help="target peak z of the linear map (default 8)")
    pl.add_argument("--target-center-deg", type=float, default=None,
                    help="target sd of each fitted centre coordinate, deg (protocol mode)")
    pl.add_argument("--target-snr", type=float, default=None,
                    help="target |H| / noise of the flashed-grating surface at the preferred condition")
    pl.add_argument("--minutes", type=float, default=10.0, help="minutes of sparse noise to predict for (default 10)")
    pl.add_argument("--ny", type=int, default=16, help="grid rows (default 16)")
    pl.add_argument("--nx", type=int, default=24, help="grid columns (default 24)")
    pl.add_argument("--spacing-deg", type=float, nargs=2, default=(2.0, 2.0), metavar=("DX", "DY"),
                    help="pixel spacing in degrees (default 2 2)")
    pl.add_argument("--spots", type=int, default=4, help="spots per frame (default 4)")
    pl.add_argument("--rate-hz", type=float, default=20.0, help="sparse-noise frames per second (default 20)")
    pl.add_argument("--cell-rate-hz", type=float, default=None, help="the cell's mean firing rate, spikes/s")
    pl.add_argument("--field-sd-deg", type=float, default=None, help="the field's Gaussian sd, deg")
    pl.add_argument("--peak-hz", type=float, default=None,
                    help="rate above baseline at the cell's optimal stimulus, spikes/s")
    pl.add_argument("--latency-s", type=float, default=0.05, help="response latency (default 0.05)")
    pl.add_argument("--temporal-sd-s", type=float, default=0.015, help="sd of the response in time (default 0.015)")
    pl.add_argument("--phases", type=int, default=4, help="flashed gratings: phases per grating (default 4)")
    pl.add_argument("--contrast", type=float, default=1.0, help="flashed gratings: contrast (default 1)")
    pl.add_argument("--flashed-rate-hz", type=float, default=10.0,
                    help="flashed gratings: presentations per second (default 10)")
    pl.add_argument("--variance-factor", type=float, default=1.5,
                    help="flashed gratings: frame-response variance over the Poisson value (default 1.5)")
    pl.add_argument("--max-lag", type=float, default=0.2, dest="max_lag_s", help="longest lag (default 0.2)")
    pl.add_argument("--seed", type=int, default=0, help="seed for the shuffles (default 0)")
    pl.add_argument("--out", type=Path, default=None, help="with SESSION: also write the per-cell table here (CSV)")
    _add_common(pl)

    demo = sub.add_parser("demo", help="run the whole job on the shipped demo session",
                          description="Analyze data_demo/ (simulated) and write a report.")
    demo.add_argument("--out", type=Path, default=Path("map2d_demo_results"),
                      help="results folder (default ./map2d_demo_results)")
    _add_common(demo)
    return parser


def _add_render_args(p):
    p.add_argument("--render", action="store_true",
                   help="also write frames at display resolution as a uint8 TIFF stack")
    p.add_argument("--display", type=_number(1e-3, 1e6), nargs=5, metavar=("W_CM", "H_CM", "W_PX", "H_PX", "DIST_CM"),
                   default=(52.0, 29.25, 1920, 1080, 30.0),
                   help="screen width and height (cm), resolution (px) and viewing distance (cm)")
    p.add_argument("--eye-cm", type=_number(-1e5, 1e5), nargs=2, default=(0.0, 0.0), metavar=("X", "Y"),
                   help="eye position relative to the screen centre (cm)")
    p.add_argument("--render-scale", type=_number(-10 ** 6, 10 ** 4, integer=True), default=1,
                   help="render every Nth screen pixel (1 = full resolution)")
    p.add_argument("--render-frames", type=_number(-10 ** 6, 10 ** 6, integer=True), default=60,
                   help="number of frames to render (default 60; a whole session is very large)")
    p.add_argument("--render-start", type=_number(-10 ** 9, 10 ** 9, integer=True), default=0,
                   help="first frame to render (default 0)")
    p.add_argument("--render-rate-hz", type=_number(0.0, 1000.0, above=True), default=60.0,
                   help="display refresh rate used to render drifting gratings (default 60)")


def _dispatch(args) -> int:
    from . import pipeline
    if args.command == "stimulus":
        if args.stimulus_kind is None:
            raise SystemExit("map2d stimulus: choose sparse-noise or gratings (see --help)")
        print(CAUTION, file=sys.stderr)
        return pipeline.run_stimulus(args)
    if args.command == "simulate":
        return pipeline.run_simulate(args)
    if args.command == "assemble":
        return pipeline.run_assemble(args.folder, frame_times=args.frame_times, spikes=args.spikes,
                                     traces=args.traces, trace_times=args.trace_times, rois=args.rois,
                                     name=args.name, overwrite=args.overwrite, quiet=args.quiet)
    if args.command == "maps":
        return pipeline.run_maps(args.session, args.out, max_lag_s=args.max_lag_s, seed=args.seed, quiet=args.quiet,
                                 fits=not args.no_fits, trace_decay=args.trace_decay, config=args.config,
                                 dense_estimate=args.dense_estimate)
    if args.command == "gratings":
        return pipeline.run_gratings(args.session, args.out, max_lag_s=args.max_lag_s, seed=args.seed,
                                     quiet=args.quiet, config=args.config, drift_latency=args.drift_latency,
                                     trace_decay=args.trace_decay)
    if args.command == "analyze":
        return pipeline.run_analyze(args.session, args.out, max_lag_s=args.max_lag_s, seed=args.seed,
                                    quiet=args.quiet, config=args.config, trace_decay=args.trace_decay,
                                    dense_estimate=args.dense_estimate, drift_latency=args.drift_latency)
    if args.command == "batch":
        return pipeline.run_batch(args.sessions, args.out, scheduler=args.scheduler, config=args.config,
                                  max_lag_s=args.max_lag_s, seed=args.seed, workers=args.workers,
                                  memory_limit=args.memory_limit, report=not args.no_report,
                                  quiet=args.quiet, trace_decay=args.trace_decay,
                                  dense_estimate=args.dense_estimate)
    if args.command == "watch":
        return pipeline.run_watch(args)
    if args.command == "replay":
        from .replay import replay_session
        return replay_session(args.session, args.folder, speed=args.speed, seconds=args.seconds, quiet=args.quiet)
    if args.command == "plan":
        return pipeline.run_plan(args)
    if args.command == "demo":
        return pipeline.run_demo(args.out, quiet=args.quiet)
    raise AssertionError(args.command)


def main(argv=None) -> int:
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except _ArgumentError as exc:
        print(f"map2d: error: {exc} (see --help)", file=sys.stderr)
        return 2
    if args.command is None:
        parser.print_help()
        return 0
    from .contract import InputWarning
    from .errors import BadInput, Terminated, environment_error, raise_if_stopped

    def show_warning(message, category, filename, lineno, file=None, line=None):
        if issubclass(category, InputWarning):
            print(f"map2d: warning: {message}", file=sys.stderr)
        elif getattr(args, "debug", False):
            print(warnings.formatwarning(message, category, filename, lineno, line), file=sys.stderr, end="")

    warnings.showwarning = show_warning
    for stream in (sys.stdout, sys.stderr):       # a path that is not UTF-8 never breaks a message
        with contextlib.suppress(AttributeError, ValueError, io.UnsupportedOperation):
            stream.reconfigure(errors="backslashreplace")
    previous = _catch_sigterm()
    try:
        code = int(_dispatch(args) or 0)
        raise_if_stopped()               # a SIGTERM whose exception some library swallowed
        return code
    except BadInput as exc:
        if args.debug:
            raise
        print(f"map2d: error: {_one_line(exc)}", file=sys.stderr)
        return 2
    except Terminated:
        print("map2d: stopped (SIGTERM); no results were written", file=sys.stderr)
        return 143
    except KeyboardInterrupt:
        print("map2d: interrupted; no results were written", file=sys.stderr)
        return 130
    except Exception as exc:  # an internal error: one line and a hint
        if args.debug:
            raise
        env = environment_error(exc, doing="use it")
        if env is not None:              # a full disk or a missing permission: not a bug
            print(f"map2d: error: {_one_line(env)}", file=sys.stderr)
            return 2
        print(f"map2d: internal error: {type(exc).__name__}: {_one_line(exc)}. "
              f"Run again with --debug for the traceback and report it.", file=sys.stderr)
        return 1
    finally:
        if previous is not None:
            signal.signal(signal.SIGTERM, previous)


#: Longest message printed (a dependency's error text can run to pages); --debug shows all of it.
MAX_MESSAGE_CHARS = 400


def _one_line(exc) -> str:
    """``exc``'s message on one line (whitespace runs, newlines included, become one space), cut to
    :data:`MAX_MESSAGE_CHARS` characters with a pointer to ``--debug``.

    >>> _one_line(ValueError("a\\n  b"))
    'a b'
    """
    text = " ".join(str(exc).split())
    if len(text) > MAX_MESSAGE_CHARS:
        text = text[:MAX_MESSAGE_CHARS - 40].rstrip() + " ... (--debug shows all of it)"
    return text


def _catch_sigterm():
    """SIGTERM raises :class:`map2d.errors.Terminated` in the main thread, so that a stopped run
    removes its temporary folder and ends its worker processes; returns the previous handler
    (None where no handler can be set, e.g. outside the main thread)."""
    from .errors import request_stop

    def stop(signum, frame):
        request_stop()

    try:
        return signal.signal(signal.SIGTERM, stop)
    except (ValueError, OSError):
        return None


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
