"""NWB files as acquisition and conversion pipelines write them (made here with pynwb directly, not
with map2d's converter): image data in the schema's (frame, x, y) order, a response series over part
of a PlaneSegmentation, stimulus columns with offsets and scales, flashed and drifting gratings in
separate tables or in one mixed table, blanks without orientation, IndexSeries + Images templates
(or an ImageSeries of templates, the older indexed_timeseries).
Each reads into the arrays of the equivalent session folder (so the analysis is the folder's), or is
refused naming the mapping key to set.

The layouts follow the NWB schema (NWB format specification 2.x: ImageSeries.data dims
``(frame, x, y)``; Image data ``(x, y)``; IndexSeries.data indexes ``indexed_images`` in the order of
``order_of_images``; RoiResponseSeries.rois is a region of a PlaneSegmentation, whose ``id`` column
holds the ROI ids; TimeIntervals rows have their own ``id``).
"""

from __future__ import annotations

import datetime
import json
import warnings

import numpy as np
import pytest

pynwb = pytest.importorskip("pynwb")

from pynwb import NWBHDF5IO, NWBFile, TimeSeries  # noqa: E402
from pynwb.epoch import TimeIntervals  # noqa: E402
from pynwb.image import GrayscaleImage, Images, ImageSeries, IndexSeries  # noqa: E402

from map2d.analysis import analyze_session  # noqa: E402
from map2d.contract import (GRATING_COLUMNS, InputWarning, Traces, _fmt, load_session,  # noqa: E402
                            write_session)
from map2d.errors import BadInput  # noqa: E402
from map2d.nwb import load_nwb, load_source  # noqa: E402
from map2d.simulate import simulate_session  # noqa: E402

TINY = dict(n_cells=4, minutes=2.0, cell_types=["on_dog", "off_dog", "simple", "complex"], seed=11,
            flashed_minutes=1.0, n_orientations=6, n_phases=4, n_directions=4, repeats=1,
            peak_rate_hz=(150.0, 220.0), baseline_hz=(0.5, 1.5))
START = datetime.datetime(2026, 1, 5, 9, 30, tzinfo=datetime.timezone.utc)


def _quiet(fn, *args, **kwargs):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", InputWarning)
        return fn(*args, **kwargs)


def _write(nwbfile, path):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        with NWBHDF5IO(str(path), "w") as io:
            io.write(nwbfile)
    return path


def _new_file(name="rec"):
    return NWBFile(session_description="receptive-field mapping", identifier=f"lab-{name}",
                   session_start_time=START, session_id=name)


def _grating_rows(table, g, rows, name=None, stripe=True, nan_blanks=True):
    """Rows ``rows`` of GratingTable ``g`` into a TimeIntervals table as a stimulus program logs them:
    the stripe angle (wave vector - 90 deg), phase in cycles, blanks as NaN orientation and SF."""
    for i in rows:
        blank = g.contrast[i] == 0
        row = dict(start_time=float(g.onset_s[i]), stop_time=float(g.offset_s[i]),
                   stripe_angle=np.nan if (blank and nan_blanks) else float(g.orientation_deg[i]) - (90.0 if stripe else 0),
                   spatial_frequency=np.nan if (blank and nan_blanks) else float(g.sf_cpd[i]),
                   phase_cycles=float(g.phase_deg[i]) / 360.0,
                   contrast=1.0 if (blank and nan_blanks) else float(g.contrast[i]),
                   temporal_frequency=float(g.tf_hz[i]))
        if name is not None:
            row["stimulus_name"] = name(i)
        table.add_row(**row)


def _stim_table(name, with_name=False):
    t = TimeIntervals(name=name, description="grating presentations")
    for c, d in (("stripe_angle", "stripe angle (deg)"), ("spatial_frequency", "cycles/deg"),
                 ("phase_cycles", "phase (cycles)"), ("contrast", "contrast"), ("temporal_frequency", "Hz")):
        t.add_column(c, d)
    if with_name:
        t.add_column("stimulus_name", "which stimulus")
    return t


COLUMNS = {"orientation_deg": {"column": "stripe_angle", "offset": 90},
           "sf_cpd": "spatial_frequency", "phase_deg": {"column": "phase_cycles", "scale": 360},
           "contrast": "contrast", "tf_hz": "temporal_frequency"}


@pytest.fixture(scope="module")
def lab(tmp_path_factory):
    """A spikes session simulated as a folder, and the same recording as a lab's NWB file: units table,
    sparse noise as an ImageSeries (frame, x, y), flashed and drifting gratings in two tables (stripe
    angle, phase in cycles, NaN blanks), and one mixed table of every stimulus with a name column."""
    session, _ = simulate_session(responses="spikes", **TINY)
    root = tmp_path_factory.mktemp("lab")
    folder = write_session(root / "folder", session)
    f = _new_file()
    r = session.responses
    for cid in r.cell_ids:
        f.add_unit(spike_times=r.time_s[r.cell == cid], id=int(cid))
    sn = session.sparse_noise
    f.add_stimulus(ImageSeries(name="noise_movie", data=np.ascontiguousarray(sn.frames.transpose(0, 2, 1)),
                               unit="n.a.", timestamps=sn.times_s, description="sparse noise, (frame, x, y)"))
    g = session.gratings
    flashed = _stim_table("flashed_gratings")
    _grating_rows(flashed, g, np.flatnonzero(g.tf_hz == 0))
    drifting = _stim_table("drifting_gratings")
    _grating_rows(drifting, g, np.flatnonzero(g.tf_hz != 0))
    mixed = _stim_table("stimuli", with_name=True)
    n = len(g)
    # every grating row, with a gray-screen row logged between them now and then (to be filtered out)
    for i in range(n):
        _grating_rows(mixed, g, [i], name=lambda k: "drifting" if g.tf_hz[k] else "flashed")
        if i % 50 == 0 and i + 1 < n:
            mixed.add_row(start_time=float(g.offset_s[i]), stop_time=float(g.offset_s[i]) + 1e-4,
                          stripe_angle=np.nan, spatial_frequency=np.nan, phase_cycles=np.nan, contrast=np.nan,
                          temporal_frequency=np.nan, stimulus_name="gray_screen")
    for t in (flashed, drifting, mixed):
        f.add_time_intervals(t)
    path = _write(f, root / "rec.nwb")
    grid = sn.grid.to_manifest()
    mapping = {"responses": {"kind": "spikes"},
               "sparse_noise": {"series": "noise_movie", "grid": grid},
               "gratings": [{"table": "flashed_gratings", "columns": COLUMNS,
                             "phase_origin_deg": list(g.phase_origin_deg)},
                            {"table": "drifting_gratings", "columns": COLUMNS}]}
    return session, folder, path, mapping


def _text(cells):
    """A cells table as cells.csv writes it (NaN empty), for an exact comparison."""
    return {k: [_fmt(v) for v in vals] for k, vals in cells.items()}


def _same_arrays(a, b):
    np.testing.assert_array_equal(a.cell_ids, b.cell_ids)
    np.testing.assert_array_equal(np.asarray(a.sparse_noise.frames), np.asarray(b.sparse_noise.frames))
    assert a.sparse_noise.grid == b.sparse_noise.grid
    for c in GRATING_COLUMNS:
        np.testing.assert_array_equal(getattr(a.gratings, c), getattr(b.gratings, c), err_msg=c)
    assert tuple(a.gratings.phase_origin_deg) == tuple(b.gratings.phase_origin_deg)


def test_schema_order_offsets_two_tables_and_nan_blanks_analyse_like_the_folder(lab):
    """The lab's file read by the mapping (no axes: the schema's order) is the folder session, and
    analyses into the same cells table (orientations, F1/F0 from the second table, centres)."""
    session, folder, path, mapping = lab
    s = _quiet(load_nwb, path, mapping)
    f = _quiet(load_session, folder)
    _same_arrays(f, s)
    a = analyze_session(f, n_jobs=1)
    b = analyze_session(s, n_jobs=1)
    assert _text(a.cells) == _text(b.cells)
    assert np.isfinite(np.asarray(b.cells["f1_f0"], float)).any()    # drifting gratings were read


def test_the_same_frames_read_as_y_x_are_refused_or_transposed(lab, tmp_path):
    """Without an orientation statement nothing is transposed silently: a mapping that states the
    session folder's (y, x) order for the schema-ordered movie gets a transposed grid, which the
    declared grid size refuses; the schema order gives the folder's frames."""
    session, folder, path, mapping = lab
    sn = session.sparse_noise
    m = json.loads(json.dumps(mapping))
    m["sparse_noise"]["grid"]["size"] = [sn.grid.nx, sn.grid.ny]
    np.testing.assert_array_equal(_quiet(load_nwb, path, m).sparse_noise.frames, sn.frames)
    m["sparse_noise"]["axes"] = "yx"
    with pytest.raises(BadInput, match=r"sparse_noise.grid.size.*axes 'yx'"):
        _quiet(load_nwb, path, m)


def test_a_square_grid_in_schema_order_needs_an_orientation_statement(tmp_path):
    """A square movie as image data: (frame, x, y) and (frame, y, x) look the same, so the mapping must
    say which; with axes and first_row stated, the frames come out row 0 at the top."""
    rng = np.random.default_rng(3)
    frames = rng.choice(np.array([-1, 0, 0, 0, 1], np.int8), size=(50, 6, 6))     # (frame, y, x), row 0 top
    stored = np.ascontiguousarray(frames.transpose(0, 2, 1)[:, :, ::-1])          # (frame, x, y), y up
    f = _new_file("square")
    f.add_unit(spike_times=np.linspace(0.1, 4.9, 40), id=0)
    f.add_stimulus(ImageSeries(name="noise_movie", data=stored, unit="n.a.", rate=10.0, starting_time=0.0))
    path = _write(f, tmp_path / "square.nwb")
    m = {"responses": {"kind": "spikes"},
         "sparse_noise": {"series": "noise_movie", "grid": {"center_deg": [0, 0], "spacing_deg": [2, 2]}}}
    with pytest.raises(BadInput, match=r"sparse_noise.axes: is needed.*square grid.*first_row"):
        _quiet(load_nwb, path, m)
    m["sparse_noise"].update(axes="xy", first_row="bottom")
    np.testing.assert_array_equal(_quiet(load_nwb, path, m).sparse_noise.frames, frames)


def test_mixed_table_with_a_row_filter_reads_both_kinds(lab):
    session, folder, path, mapping = lab
    m = dict(mapping, gratings={"table": "stimuli", "columns": COLUMNS, "rows": {"stimulus_name": ["flashed", "drifting"]},
                                "phase_origin_deg": list(session.gratings.phase_origin_deg)})
    _same_arrays(_quiet(load_session, folder), _quiet(load_nwb, path, m))
    m["gratings"] = dict(m["gratings"], rows={"stimulus_name": "flashed"})
    s = _quiet(load_nwb, path, m)
    assert len(s.gratings) == int(np.sum(session.gratings.tf_hz == 0)) and not s.gratings.tf_hz.any()


def test_unfiltered_mixed_table_and_unknown_column_keys_are_refused(lab):
    """The gray-screen rows have no contrast (NaN): refused with the row's id in the file; a column
    spec with a key map2d does not know is refused, naming it (not ignored)."""
    session, folder, path, mapping = lab
    m = dict(mapping, gratings={"table": "stimuli", "columns": COLUMNS})
    with pytest.raises(BadInput, match=r"stimuli.*row id 1: is not finite"):    # row id 1 = the first gray row
        _quiet(load_nwb, path, m)
    cols = dict(COLUMNS, orientation_deg={"column": "stripe_angle", "shift": 90})
    m = dict(mapping, gratings={"table": "flashed_gratings", "columns": cols})
    with pytest.raises(BadInput, match=r"gratings.columns.orientation_deg.shift: unknown key"):
        _quiet(load_nwb, path, m)
    m = dict(mapping, gratings={"table": "flashed_gratings", "columns": dict(COLUMNS, direction="x")})
    with pytest.raises(BadInput, match=r"gratings.columns.direction: unknown key"):
        _quiet(load_nwb, path, m)


def test_offset_changes_the_orientations(lab):
    """Without the offset the stripe angles are read as wave-vector angles: 90 deg off."""
    session, folder, path, mapping = lab
    cols = dict(COLUMNS, orientation_deg="stripe_angle")
    m = dict(mapping, gratings={"table": "flashed_gratings", "columns": cols})
    s = _quiet(load_nwb, path, m)
    g = session.gratings.subset(session.gratings.tf_hz == 0)
    grating = g.contrast != 0
    np.testing.assert_array_equal(s.gratings.orientation_deg[grating], g.orientation_deg[grating] - 90)


def _plane(f, n_rois, ids, masks):
    from pynwb.ophys import ImageSegmentation, OpticalChannel
    device = f.create_device("scope")
    ch = OpticalChannel(name="green", description="green", emission_lambda=510.0)
    plane = f.create_imaging_plane("plane0", ch, description="L2/3", device=device, excitation_lambda=920.0,
                                   indicator="GCaMP", location="V1")
    mod = f.create_processing_module("ophys", "processed imaging")
    seg = ImageSegmentation()
    mod.add(seg)
    ps = seg.create_plane_segmentation("cells", plane, name="PlaneSegmentation")
    for k in range(n_rois):
        ps.add_roi(image_mask=masks[k], id=int(ids[k]))
    return mod, ps


@pytest.mark.filterwarnings("ignore:The linked table:UserWarning")
def test_partial_roi_region_gives_roi_ids_and_field_of_view(tmp_path):
    """Traces of ROIs 1, 3, 5, 7 of an 8-ROI segmentation (ids 100..107), columns not in id order: cell
    ids are the ROI ids, each trace stays with its ROI, and the masks give the field-of-view labels."""
    from pynwb.ophys import Fluorescence, RoiResponseSeries
    session, _ = simulate_session(responses="traces", **TINY)
    r = session.responses
    ids = np.arange(100, 108)
    nx_fov, ny_fov = 30, 20
    masks = np.zeros((8, nx_fov, ny_fov), np.float32)                  # (ROI, x, y)
    for k in range(8):
        masks[k, 3 * k:3 * k + 2, 2 + k:5 + k] = 1.0
    f = _new_file("img")
    mod, ps = _plane(f, 8, ids, masks)
    used = [7, 1, 5, 3]                                                 # columns of the series: ROI rows
    region = ps.create_roi_table_region("imaged cells", region=used)
    data = np.ascontiguousarray(r.values[[3, 0, 2, 1]].T)               # column j = cell of ROI used[j]
    mod.add(Fluorescence(roi_response_series=RoiResponseSeries(
        name="dff", data=data, rois=region, unit="dF/F", timestamps=r.times_s)))
    sn = session.sparse_noise
    f.add_stimulus(TimeSeries(name="noise", data=sn.frames, unit="n.a.", timestamps=sn.times_s))
    path = _write(f, tmp_path / "img.nwb")
    m = {"responses": {"kind": "traces", "series": "dff"},
         "sparse_noise": {"series": "noise", "grid": sn.grid.to_manifest()}}
    s = _quiet(load_nwb, path, m)
    np.testing.assert_array_equal(s.cell_ids, [101, 103, 105, 107])
    np.testing.assert_array_equal(s.responses.values, r.values)          # ROI 101 holds cell 0's trace ...
    assert s.rois.shape == (ny_fov, nx_fov) and s.roi_label_offset == 1
    for k, cid in zip([1, 3, 5, 7], s.cell_ids):
        np.testing.assert_array_equal(s.rois == cid + 1, masks[k].T > 0)
    assert not np.isin(s.rois, [100 + 1, 102 + 1, 104 + 1, 106 + 1]).any()   # ROIs without a trace: none
    # the folder session with the same ids (responses.cell_ids) gives the same cells table
    folder_session = Traces(values=r.values, times_s=r.times_s, ids=np.array([101, 103, 105, 107]))
    session.responses = folder_session
    session.gratings = None
    folder = write_session(tmp_path / "folder", session)
    f = _quiet(load_session, folder)
    np.testing.assert_array_equal(f.cell_ids, s.cell_ids)
    a = analyze_session(f, n_jobs=1)
    b = analyze_session(s, n_jobs=1)
    assert _text(a.cells) == _text(b.cells)


def test_index_series_of_luminance_templates_reads_without_the_movie(tmp_path):
    """Sparse noise stored as 30 uint8 templates (0 dark, 127 background, 255 bright; (x, y) images in an
    Images container with order_of_images) and an IndexSeries: the frames are the templates' signs,
    row 0 at the top; a 128 +- 40 f dense movie becomes contrast f (dense engine, streamed)."""
    rng = np.random.default_rng(5)
    nt, ny, nx = 30, 8, 10
    signs = rng.choice(np.array([-1, 0, 0, 0, 0, 1], np.int8), size=(nt, ny, nx))
    lum = (127 + 128 * signs.astype(np.int16)).clip(0, 255).astype(np.uint8)     # 0 / 127 / 255
    idx = rng.integers(0, nt, 400)
    f = _new_file("idx")
    f.add_unit(spike_times=np.sort(rng.uniform(0, 20, 300)), id=3)
    imgs = [GrayscaleImage(name=f"t{k:03d}", data=np.ascontiguousarray(lum[k].T)) for k in range(nt)]
    templates = Images(name="noise_templates", images=imgs, description="sparse-noise templates")
    from pynwb.base import ImageReferences
    templates.order_of_images = ImageReferences(name="order_of_images", data=imgs)
    f.add_stimulus_template(templates)
    f.add_stimulus(IndexSeries(name="noise_sequence", data=idx.astype(np.uint32), indexed_images=templates,
                               unit="N/A", rate=20.0, starting_time=0.0))
    dense = (128 + 40 * rng.standard_normal((nt, ny, nx))).clip(0, 255).round().astype(np.uint8)
    dimgs = [GrayscaleImage(name=f"d{k:03d}", data=np.ascontiguousarray(dense[k].T)) for k in range(nt)]
    dtemplates = Images(name="dense_templates", images=dimgs, description="dense noise")
    dtemplates.order_of_images = ImageReferences(name="order_of_images", data=dimgs)
    f.add_stimulus_template(dtemplates)
    f.add_stimulus(IndexSeries(name="dense_sequence", data=idx.astype(np.uint32), indexed_images=dtemplates,
                               unit="N/A", rate=20.0, starting_time=0.0))
    path = _write(f, tmp_path / "idx.nwb")
    grid = {"center_deg": [0, 0], "spacing_deg": [2, 2]}
    lumspec = {"background": 127, "contrast_scale": 128}
    m = {"responses": {"kind": "spikes"},
         "sparse_noise": {"series": "noise_sequence", "grid": grid, "luminance": lumspec}}
    s = _quiet(load_nwb, path, m)
    assert s.sparse_noise.frames.dtype == np.int8
    np.testing.assert_array_equal(s.sparse_noise.frames, signs[idx])
    m["sparse_noise"] = {"series": "dense_sequence", "grid": grid,
                         "luminance": {"background": 128, "contrast_scale": 40}}
    d = _quiet(load_nwb, path, m).sparse_noise.frames
    assert d.dtype == np.float32 and not isinstance(d, np.ndarray)         # streamed, never the whole movie
    np.testing.assert_allclose(d[100:150], (dense[idx[100:150]].astype(np.float32) - 128) / 40, rtol=1e-6)
    m["sparse_noise"].pop("luminance")                                    # uint8 levels without luminance
    with pytest.raises(BadInput, match=r"dense_sequence.data, row 0: values must be -1, 0 or \+1.*luminance"):
        _quiet(load_nwb, path, m)


def test_maps_and_gratings_commands_read_nwb_with_config(lab, tmp_path):
    """``map2d maps`` and ``map2d gratings`` take --config and read the file as analyze does."""
    import map2d.cli
    session, folder, path, mapping = lab
    cfg = tmp_path / "m.json"
    cfg.write_text(json.dumps(mapping))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", InputWarning)
        assert map2d.cli.main(["gratings", str(path), "--config", str(cfg), "--out", str(tmp_path / "g1"),
                               "--quiet"]) == 0
        assert map2d.cli.main(["gratings", str(folder), "--out", str(tmp_path / "g2"), "--quiet"]) == 0
    assert (tmp_path / "g1" / "cells.csv").read_bytes() == (tmp_path / "g2" / "cells.csv").read_bytes()
    rc = map2d.cli.main(["maps", str(path), "--out", str(tmp_path / "m1"), "--quiet"])
    assert rc == 2 and not (tmp_path / "m1").exists()                   # an .nwb file without its mapping


def test_rois_beside_nwb_in_session_json_are_used(lab, tmp_path):
    import tifffile
    session, folder, path, mapping = lab
    d = tmp_path / "sess"
    d.mkdir()
    (d / "rec.nwb").write_bytes(path.read_bytes())
    labels = np.zeros((5, 6), np.int32)
    labels[1:3, 1:3] = 2
    tifffile.imwrite(d / "labels.tif", labels)
    (d / "session.json").write_text(json.dumps({"nwb": {"file": "rec.nwb", "mapping": mapping},
                                                "rois": {"file": "labels.tif", "label_offset": 1}}))
    s = _quiet(load_source, d)
    np.testing.assert_array_equal(s.rois, labels)
    assert s.roi_label_offset == 1


def test_converter_pixel_masks_and_roi_ids_come_back(tmp_path):
    """map2d's own converter writes ROI ids = cell ids and pixel masks from the label image; reading
    the file gives the same ids and the same field-of-view labels (label = id + 1), over the whole plane."""
    from map2d.nwb import session_to_nwb
    from map2d.simulate import roi_label_image
    session, _ = simulate_session(responses="traces", **dict(TINY, minutes=0.5, flashed_minutes=0.2))
    ids = np.array([2, 5, 9, 11])
    session.responses = Traces(values=session.responses.values, times_s=session.responses.times_s, ids=ids)
    session.rois = roi_label_image(ids, shape=(40, 50), radius_px=3.0, rng=1)
    session.roi_label_offset = 1
    m = session_to_nwb(session, tmp_path / "c.nwb")
    s = _quiet(load_nwb, tmp_path / "c.nwb", m)
    np.testing.assert_array_equal(s.cell_ids, ids)
    assert s.roi_label_offset == 1
    np.testing.assert_array_equal(s.rois, session.rois)      # the whole plane (stated by reference_images)


@pytest.mark.filterwarnings("ignore:The linked table:UserWarning")
@pytest.mark.parametrize("stated", ["dimension", "frames", "reference_images", "nothing"])
def test_pixel_mask_field_of_view_spans_the_imaging_plane(tmp_path, stated):
    """ROIs as ``pixel_mask`` (x, y, weight) rows (NWB schema, PlaneSegmentation.pixel_mask: "Pixel
    x-coordinate", "Pixel y-coordinate"), masks in one corner of a 48 x 36 (x, y) plane: the label image is
    the whole plane, (rows = y, columns = x), as stated by the TwoPhotonSeries over the same imaging plane
    (its ``dimension``, "Number of pixels on x, y", with the movie in an external file as acquisition
    pipelines write it; or its (frame, x, y) data), or by the segmentation's reference image; each ROI
    sits at its pixels. With nothing stated, the masks' extent, with a note saying so."""
    from pynwb.ophys import Fluorescence, ImageSegmentation, OpticalChannel, RoiResponseSeries, TwoPhotonSeries
    nx, ny = 48, 36
    ids = np.array([4, 7, 9])
    pixels = {4: [(2, 1), (3, 1), (2, 2)], 7: [(10, 5), (11, 5)], 9: [(0, 12), (1, 13), (20, 14)]}   # (x, y)
    f = _new_file("px")
    device = f.create_device("scope")
    ch = OpticalChannel(name="green", description="green", emission_lambda=510.0)
    plane = f.create_imaging_plane("plane0", ch, description="L2/3", device=device, excitation_lambda=920.0,
                                   indicator="GCaMP", location="V1")
    # a second plane of another size, so the reader must use the series over the segmentation's own plane
    other = f.create_imaging_plane("plane1", ch, description="L4", device=device, excitation_lambda=920.0,
                                   indicator="GCaMP", location="V1")
    f.add_acquisition(TwoPhotonSeries(name="other_movie", imaging_plane=other, external_file=["other.tif"],
                                      starting_frame=[0], format="external", dimension=[512, 512], rate=30.0,
                                      num_samples=900))
    if stated == "dimension":
        f.add_acquisition(TwoPhotonSeries(name="movie", imaging_plane=plane, external_file=["movie.tif"],
                                          starting_frame=[0], format="external", dimension=[nx, ny], rate=30.0,
                                      num_samples=900))
    elif stated == "frames":
        f.add_acquisition(TwoPhotonSeries(name="movie", imaging_plane=plane, rate=30.0, unit="a.u.",
                                          data=np.zeros((3, nx, ny), np.uint16)))        # (frame, x, y)
    mod = f.create_processing_module("ophys", "processed imaging")
    seg = ImageSegmentation()
    mod.add(seg)
    ref = None
    if stated == "reference_images":
        ref = ImageSeries(name="mean_image", data=np.zeros((1, nx, ny), np.float32), unit="a.u.", rate=1.0)
        f.add_acquisition(ref)
    ps = seg.create_plane_segmentation("cells", plane, name="PlaneSegmentation", reference_images=ref)
    for cid in ids:
        ps.add_roi(pixel_mask=[(x, y, 1.0) for x, y in pixels[cid]], id=int(cid))
    region = ps.create_roi_table_region("all", region=[0, 1, 2])
    rng = np.random.default_rng(2)
    times = np.arange(200) / 30.0
    mod.add(Fluorescence(roi_response_series=RoiResponseSeries(
        name="dff", data=rng.normal(size=(200, 3)), rois=region, unit="dF/F", timestamps=times)))
    f.add_stimulus(TimeSeries(name="noise", data=rng.choice(np.array([-1, 0, 1], np.int8), size=(200, 4, 5)),
                              unit="n.a.", timestamps=times))
    path = _write(f, tmp_path / "px.nwb")
    m = {"responses": {"kind": "traces", "series": "dff"},
         "sparse_noise": {"series": "noise", "axes": "yx", "first_row": "top",
                          "grid": {"nx": 5, "ny": 4, "spacing_deg": [5.0, 5.0],
                                   "center_deg": [0.0, 0.0]}}}
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", InputWarning)
        s = load_nwb(path, m)
    extent_notes = [str(w.message) for w in caught if "masks' extent" in str(w.message)]
    np.testing.assert_array_equal(s.cell_ids, ids)
    if stated == "nothing":
        assert s.rois.shape == (15, 21)                                 # max y + 1, max x + 1
        assert len(extent_notes) == 1 and "PlaneSegmentation" in extent_notes[0]
    else:
        assert s.rois.shape == (ny, nx) and not extent_notes
    expected = np.zeros(s.rois.shape, np.int64)
    for cid in ids:
        for x, y in pixels[cid]:
            expected[y, x] = cid + 1                                   # row = y, column = x
    np.testing.assert_array_equal(s.rois, expected)


@pytest.mark.filterwarnings("ignore:The linked table:UserWarning")
def test_pixel_mask_past_the_stated_plane_is_refused(tmp_path):
    """A pixel mask outside the plane the TwoPhotonSeries states is refused, naming the field."""
    from pynwb.ophys import Fluorescence, ImageSegmentation, OpticalChannel, RoiResponseSeries, TwoPhotonSeries
    f = _new_file("px2")
    device = f.create_device("scope")
    ch = OpticalChannel(name="green", description="green", emission_lambda=510.0)
    plane = f.create_imaging_plane("plane0", ch, description="L2/3", device=device, excitation_lambda=920.0,
                                   indicator="GCaMP", location="V1")
    f.add_acquisition(TwoPhotonSeries(name="movie", imaging_plane=plane, external_file=["movie.tif"],
                                      starting_frame=[0], format="external", dimension=[16, 8], rate=30.0,
                                      num_samples=900))
    mod = f.create_processing_module("ophys", "processed imaging")
    seg = ImageSegmentation()
    mod.add(seg)
    ps = seg.create_plane_segmentation("cells", plane, name="PlaneSegmentation")
    ps.add_roi(pixel_mask=[(3, 9, 1.0)], id=0)                                # y = 9 past 8 rows
    region = ps.create_roi_table_region("all", region=[0])
    times = np.arange(50) / 30.0
    mod.add(Fluorescence(roi_response_series=RoiResponseSeries(
        name="dff", data=np.zeros((50, 1)), rois=region, unit="dF/F", timestamps=times)))
    f.add_stimulus(TimeSeries(name="noise", data=np.zeros((50, 4, 5), np.int8), unit="n.a.", timestamps=times))
    path = _write(f, tmp_path / "px2.nwb")
    m = {"responses": {"kind": "traces", "series": "dff"},
         "sparse_noise": {"series": "noise", "axes": "yx", "first_row": "top",
                          "grid": {"nx": 5, "ny": 4, "spacing_deg": [5.0, 5.0],
                                   "center_deg": [0.0, 0.0]}}}
    with pytest.raises(BadInput, match=r"pixel_mask.*16 x 8.*movie\.dimension"):
        _quiet(load_nwb, path, m)


def test_index_series_with_indexed_timeseries_templates_analyses_like_the_folder(lab, tmp_path):
    """The older way to store a template sequence (NWB schema 2.x, IndexSeries.indexed_timeseries: an
    ImageSeries of templates, (template, x, y), in stimulus/templates; deprecated in favour of
    indexed_images but still written and read): the lab's sparse noise as its frames in shuffled order
    plus one index per frame reads into the folder session's frames and analyses into the same cells table."""
    session, folder, _, lab_mapping = lab
    sn = session.sparse_noise
    frames = np.asarray(sn.frames)
    perm = np.random.default_rng(8).permutation(frames.shape[0])
    templates = frames[perm]                                                # (template, y, x), shuffled
    idx = np.argsort(perm)                                                  # templates[idx] == frames
    assert not np.array_equal(idx, np.arange(idx.size))                     # the index really indexes
    f = _new_file("old_index")
    r = session.responses
    for cid in r.cell_ids:
        f.add_unit(spike_times=r.time_s[r.cell == cid], id=int(cid))
    stack = ImageSeries(name="noise_templates", data=np.ascontiguousarray(templates.transpose(0, 2, 1)),
                        unit="n.a.", rate=1.0, description="sparse-noise templates, (template, x, y)")
    f.add_stimulus_template(stack)
    # current pynwb refuses to build a new IndexSeries with indexed_timeseries (it only reads them from
    # older files); built the way its reader builds one, as older pynwb versions wrote it
    seq = IndexSeries.__new__(IndexSeries, in_construct_mode=True)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        seq.__init__(name="noise_sequence", data=np.asarray(idx, np.uint32), indexed_timeseries=stack,
                     unit="N/A", timestamps=sn.times_s)
    seq._in_construct_mode = False
    f.add_stimulus(seq)
    g = session.gratings
    flashed = _stim_table("flashed_gratings")
    _grating_rows(flashed, g, np.flatnonzero(g.tf_hz == 0))
    drifting = _stim_table("drifting_gratings")
    _grating_rows(drifting, g, np.flatnonzero(g.tf_hz != 0))
    f.add_time_intervals(flashed)
    f.add_time_intervals(drifting)
    path = _write(f, tmp_path / "old_index.nwb")
    import h5py
    with h5py.File(path, "r") as h5:                                         # the file holds the old link
        group = h5["stimulus/presentation/noise_sequence"]
        assert "indexed_timeseries" in group and "indexed_images" not in group
    mapping = dict(lab_mapping, sparse_noise={"series": "noise_sequence", "grid": sn.grid.to_manifest()})
    s = _quiet(load_nwb, path, mapping)
    fs = _quiet(load_session, folder)
    _same_arrays(fs, s)
    a = analyze_session(fs, n_jobs=1)
    b = analyze_session(s, n_jobs=1)
    assert _text(a.cells) == _text(b.cells)
