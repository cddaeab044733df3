"""TIFF map stacks (ImageJ hyperstack, OME-TIFF) and imaging field-of-view maps."""

from __future__ import annotations

import xml.etree.ElementTree as ET

import numpy as np
import pytest
import tifffile

from map2d.export import (
    OME_NAMESPACE,
    fov_planes,
    plane_labels,
    read_fov,
    read_maps_ome_tiff,
    read_maps_tiff,
    write_fov,
    write_maps_ome_tiff,
    write_maps_tiff,
)
from map2d.geometry import Grid
from map2d.models import gaussian2d

# Non-square, odd, off-centre grid with dx != dy: a flip or transpose cannot go unnoticed.
GRID = Grid(ny=9, nx=13, center_x_deg=12.5, center_y_deg=-4.0, dx_deg=2.5, dy_deg=1.5)
LAGS = [0.025, 0.05, 0.075]
CELLS = [3, 7]
KINDS = ("ON", "OFF", "linear")


def _random_maps(rng=0):
    rng = np.random.default_rng(rng)
    maps = rng.normal(size=(len(LAGS), len(CELLS), len(KINDS)) + GRID.shape)
    maps[0, 0, 1, 2, 5] = np.nan          # NaN must survive
    return maps


# ----------------------------------------------------------------------------------- ImageJ TIFF

def test_imagej_round_trip_values_axes_unit_labels_resolution_origin(tmp_path):
    maps = _random_maps()
    path = tmp_path / "maps.tif"
    write_maps_tiff(path, maps, GRID, LAGS, CELLS, KINDS, unit_label="spikes/s")
    r = read_maps_tiff(path)

    expected = maps.astype(np.float32)
    assert r["array"].dtype == np.float32
    assert r["array"].shape == expected.shape
    np.testing.assert_array_equal(r["array"], expected)      # exact, NaN in the same place
    assert r["axes"] == "TZCYX"
    assert r["unit"] == "deg"
    np.testing.assert_allclose(r["resolution"], (1 / 2.5, 1 / 1.5), rtol=1e-12)
    # origin: calibrated x = (j - xorigin) * dx = azimuth of column j; (i - yorigin) * dy = -elevation
    np.testing.assert_allclose(r["origin"], (-GRID.x_deg[0] / 2.5, GRID.y_deg[0] / 1.5), rtol=1e-12)
    assert r["inverty"] is True
    assert (r["lags_s"], r["cell_ids"], r["kinds"], r["value_unit"]) == (LAGS, CELLS, list(KINDS),
                                                                         "spikes/s")
    # one label per plane in ImageJ's T, Z, C order (C fastest)
    assert len(r["labels"]) == maps.shape[0] * maps.shape[1] * maps.shape[2]
    assert r["labels"] == plane_labels(LAGS, CELLS, KINDS)
    n_z, n_c = len(CELLS), len(KINDS)
    for t, z, c in [(0, 0, 0), (2, 1, 0), (1, 0, 2)]:
        assert r["labels"][(t * n_z + z) * n_c + c] == \
            f"cell {CELLS[z]}, lag {LAGS[t] * 1000:g} ms, {KINDS[c]}"

    # the same facts straight from tifffile, independent of our reader
    with tifffile.TiffFile(path) as tif:
        assert tif.is_imagej
        assert tif.series[0].axes == "TZCYX"
        assert tif.series[0].dtype == np.float32
        ij = tif.imagej_metadata
        assert (ij["frames"], ij["slices"], ij["channels"]) == (3, 2, 3)
        assert ij["unit"] == "deg"
        assert ij["Labels"][0] == "cell 3, lag 25 ms, ON"
        page = tif.pages.first
        assert page.tags["ResolutionUnit"].value == 1        # NONE: ImageJ takes the unit from 'unit'
        num, den = page.tags["XResolution"].value
        assert num / den == pytest.approx(0.4, rel=1e-12)


def _peak_maps(x_true, y_true):
    """A simulated ON cell (cell index 1, lag index 2) and an OFF blob elsewhere as a decoy."""
    X, Y = GRID.mesh_deg()
    maps = np.zeros((len(LAGS), len(CELLS), len(KINDS)) + GRID.shape)
    maps[2, 1, 0] = gaussian2d(X, Y, x_true, y_true, 3.0, 1.2, 0.0, amplitude=5.0)
    maps[2, 1, 1] = gaussian2d(X, Y, GRID.x_deg[9], GRID.y_deg[1], 2.0, 1.0, 0.0, amplitude=9.0)
    maps[0, 0, 0] = gaussian2d(X, Y, GRID.x_deg[1], GRID.y_deg[7], 2.0, 1.0, 0.0, amplitude=9.0)
    return maps


def test_on_cell_plane_peaks_at_true_position_with_contract_and_imagej_calibration(tmp_path):
    i_true, j_true = 6, 3                       # below and left of centre: flips would move it
    x_true, y_true = GRID.x_deg[j_true], GRID.y_deg[i_true]
    path = tmp_path / "maps.tif"
    write_maps_tiff(path, _peak_maps(x_true, y_true), GRID, LAGS, CELLS, KINDS)
    r = read_maps_tiff(path)
    plane = r["array"][2, 1, 0]
    assert plane.shape == (GRID.ny, GRID.nx)
    i, j = np.unravel_index(np.argmax(plane), plane.shape)
    # contract's grid convention
    assert (i, j) == (i_true, j_true)
    assert GRID.point_of(i, j) == pytest.approx((x_true, y_true))
    # ImageJ calibration alone: x = (j - xorigin) / xres; y = -(i - yorigin) / yres
    xres, yres = r["resolution"]
    xorigin, yorigin = r["origin"]
    assert (j - xorigin) / xres == pytest.approx(x_true, abs=1e-9)
    assert -(i - yorigin) / yres == pytest.approx(y_true, abs=1e-9)
    assert (yorigin - i) / yres == pytest.approx(y_true, abs=1e-9)   # ImageJ with inverted y
    assert r["x_deg"][j] == pytest.approx(x_true) and r["y_deg"][i] == pytest.approx(y_true)


def test_off_grid_on_cell_centroid_lands_on_true_position(tmp_path):
    # Centroid of a Gaussian sampled at spacing <= sigma equals its centre to far below 0.01 deg
    # (sampling theorem / Poisson summation; common practice). Truth lies between pixel centres.
    x_true, y_true = 9.1, -5.3
    path = tmp_path / "maps.tif"
    write_maps_tiff(path, _peak_maps(x_true, y_true), GRID, LAGS, CELLS, KINDS)
    r = read_maps_tiff(path)
    w = r["array"][2, 1, 0].astype(float)
    rows, cols = np.indices(w.shape)
    ci, cj = (w * rows).sum() / w.sum(), (w * cols).sum() / w.sum()
    assert GRID.point_of(ci, cj) == pytest.approx((x_true, y_true), abs=0.02)
    xres, yres = r["resolution"]
    xorigin, yorigin = r["origin"]
    assert (cj - xorigin) / xres == pytest.approx(x_true, abs=0.02)
    assert -(ci - yorigin) / yres == pytest.approx(y_true, abs=0.02)


def test_zero_top_row_elevation_leaves_out_inverty_and_single_lag_cell_keep_their_axes(tmp_path):
    grid = Grid(ny=3, nx=5, center_x_deg=-2.0, center_y_deg=-0.5, dx_deg=1.0, dy_deg=0.5)
    assert grid.y_deg[0] == 0.0
    maps = np.arange(1 * 1 * 3 * 3 * 5, dtype=float).reshape(1, 1, 3, 3, 5)
    path = tmp_path / "maps.tif"
    write_maps_tiff(path, maps, grid, [0.04], [0], KINDS)
    r = read_maps_tiff(path)
    assert r["array"].shape == (1, 1, 3, 3, 5)
    np.testing.assert_array_equal(r["array"], maps.astype(np.float32))
    assert r["inverty"] is False
    assert r["origin"] == (4.0, 0.0)         # x of column 0 = -4 deg, 1 deg per pixel
    np.testing.assert_allclose(r["x_deg"], grid.x_deg)
    np.testing.assert_allclose(r["y_deg"], grid.y_deg)
    assert r["labels"] == ["cell 0, lag 40 ms, ON", "cell 0, lag 40 ms, OFF", "cell 0, lag 40 ms, linear"]


# ------------------------------------------------------------------------------------- OME-TIFF

def test_ome_round_trip_values_sizes_and_annotation(tmp_path):
    maps = _random_maps(1)
    path = tmp_path / "maps.ome.tif"
    write_maps_ome_tiff(path, maps, GRID, LAGS, CELLS, KINDS, unit_label="dF/F")
    r = read_maps_ome_tiff(path)
    np.testing.assert_array_equal(r["array"], maps.astype(np.float32))
    assert r["axes"] == "TZCYX"
    assert r["physical_size"] == (2.5, 1.5)
    assert r["physical_size_unit"] == ("reference frame", "reference frame")
    assert r["channel_names"] == list(KINDS)
    assert r["lags_s"] == LAGS and r["cell_ids"] == CELLS and r["kinds"] == list(KINDS)
    assert r["degrees_per_pixel"] == (2.5, 1.5)
    assert r["grid_center_deg"] == (12.5, -4.0)

    # independent parse of the OME XML with xml.etree
    with tifffile.TiffFile(path) as tif:
        assert tif.is_ome
        root = ET.fromstring(tif.ome_metadata)
    ns = {"o": root.tag[1:].split("}")[0]}
    pixels = root.find("o:Image/o:Pixels", ns)
    assert pixels.get("DimensionOrder") == "XYCZT"       # OME order, fastest first = TZCYX in numpy
    assert (pixels.get("SizeT"), pixels.get("SizeZ"), pixels.get("SizeC"),
            pixels.get("SizeY"), pixels.get("SizeX")) == ("3", "2", "3", "9", "13")
    assert float(pixels.get("TimeIncrement")) == pytest.approx(0.025)
    anns = [a for a in root.iter(f"{{{ns['o']}}}MapAnnotation") if a.get("Namespace") == OME_NAMESPACE]
    assert len(anns) == 1
    kv = {m.get("K"): m.text for m in anns[0].iter(f"{{{ns['o']}}}M")}
    assert float(kv["degrees_per_pixel_x"]) == 2.5 and float(kv["degrees_per_pixel_y"]) == 1.5
    assert float(kv["grid_center_x_deg"]) == 12.5 and float(kv["grid_center_y_deg"]) == -4.0
    assert float(kv["x_of_column_0_deg"]) == GRID.x_deg[0]
    assert float(kv["y_of_row_0_deg"]) == GRID.y_deg[0]
    assert "degree of visual angle" in kv["length_unit"]
    assert kv["value_unit"] == "dF/F"
    assert kv["axes"] == "TZCYX"
    assert "azimuth" in kv["x_axis"] and "elevation" in kv["y_axis"]
    assert all(f"axis_{a}" in kv for a in "TZCYX")
    # the image references the annotation
    ref = root.find("o:Image/o:AnnotationRef", ns)
    assert ref is not None and ref.get("ID") == anns[0].get("ID")


# ---------------------------------------------------------------------------------- bad inputs

@pytest.mark.parametrize("writer", [write_maps_tiff, write_maps_ome_tiff])
@pytest.mark.parametrize("change, word", [
    (dict(maps=np.zeros((3, 2, 9, 13))), "maps"),
    (dict(maps=np.zeros((3, 2, 3, 13, 9))), "grid"),
    (dict(lags_s=[0.1, 0.2]), "lags_s"),
    (dict(cell_ids=[1, 2, 3]), "cell_ids"),
    (dict(cell_ids=[1, 1]), "cell_ids"),
    (dict(kinds=("ON", "OFF")), "kinds"),
    (dict(grid=(9, 13)), "grid"),
])
def test_bad_map_inputs_raise_value_error_naming_the_argument(tmp_path, writer, change, word):
    args = dict(maps=np.zeros((3, 2, 3, 9, 13)), grid=GRID, lags_s=LAGS, cell_ids=CELLS, kinds=KINDS)
    args.update(change)
    path = tmp_path / "maps.tif"
    with pytest.raises(ValueError, match=word):
        writer(path, **args)
    assert not path.exists()


# ------------------------------------------------------------------------------------- FOV maps

def _label_image():
    labels = np.zeros((40, 56), dtype=np.uint16)
    labels[3:9, 4:12] = 1
    labels[20:27, 30:35] = 2
    labels[30:38, 45:53] = 4
    labels[12:16, 40:50] = 9          # an ROI with no cell in the table
    labels[0:2, 0:3] = 3              # cell 3 has NaN values
    return labels


def test_fov_each_roi_carries_its_cell_value_and_nan_elsewhere(tmp_path):
    labels = _label_image()
    cells = np.array([1, 2, 3, 4, 5])         # cell 5 has no ROI
    props = {
        "center_x_deg": np.array([10.0, -3.5, np.nan, 7.25, 1.0]),
        "pref_orientation_deg": np.array([170.0, 15.0, np.nan, 90.0, 45.0]),
        "responsive": np.array([True, False, False, True, True]),
    }
    paths = write_fov(tmp_path / "out", labels, cells, props,
                      background=np.random.default_rng(0).random(labels.shape))
    assert [p.name for p in paths] == ["fov.tif", "fov_center_x_deg.png",
                                       "fov_pref_orientation_deg.png", "fov_responsive.png"]
    for p in paths[1:]:
        assert p.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" and p.stat().st_size > 2000

    r = read_fov(paths[0])
    planes = r["planes"]
    assert planes.dtype == np.float32 and planes.shape == (3,) + labels.shape
    assert r["labels"][0].startswith("center_x_deg")
    for p, values in enumerate(props.values()):
        for cell, value in zip(cells, np.asarray(values, float)):
            roi = labels == cell
            if not roi.any():
                continue
            if np.isnan(value):
                assert np.isnan(planes[p][roi]).all()
            else:
                assert np.all(planes[p][roi] == np.float32(value))
        valued = [c for c, v in zip(cells, np.asarray(values, float)) if np.isfinite(v)]
        outside = ~np.isin(labels, valued)     # background, label 9 (no cell), cells valued NaN
        assert np.isnan(planes[p][outside]).all()
    assert np.isnan(planes[0][labels == 3]).all() and np.all(planes[2][labels == 3] == 0.0)
    # tifffile sees one float32 plane per property
    with tifffile.TiffFile(paths[0]) as tif:
        assert tif.series[0].shape == (3,) + labels.shape
        assert tif.series[0].dtype == np.float32


def test_fov_label_offset_maps_zero_based_cells_to_one_based_labels():
    labels = np.array([[0, 1, 1], [2, 0, 3]])
    planes = fov_planes(labels, [0, 1, 2], {"agreement": [0.5, 0.25, 1.0]}, label_offset=1)
    expected = np.array([[np.nan, 0.5, 0.5], [0.25, np.nan, 1.0]], dtype=np.float32)
    np.testing.assert_array_equal(planes[0], expected)
    with pytest.raises(ValueError, match="label_offset"):
        fov_planes(labels, [0, 1, 2], {"agreement": [0.5, 0.25, 1.0]})   # cell 0 would be background


@pytest.mark.parametrize("kwargs, word", [
    (dict(labels=np.zeros((2, 3, 4), int)), "labels"),
    (dict(labels=np.full((3, 4), 0.5)), "labels"),
    (dict(labels=-np.ones((3, 4), int)), "labels"),
    (dict(properties={"agreement": [0.1, 0.2]}), "agreement"),
    (dict(properties={}), "properties"),
    (dict(properties={"bad/name": [1.0, 2.0, 3.0]}), "properties"),
    (dict(cell_ids=[1, 1, 2]), "cell_ids"),
    (dict(background=np.zeros((4, 3))), "background"),
])
def test_bad_fov_inputs_raise_value_error_naming_the_argument(tmp_path, kwargs, word):
    args = dict(labels=np.ones((3, 4), int), cell_ids=[1, 2, 3],
                properties={"agreement": [0.1, 0.2, 0.3]})
    args.update(kwargs)
    with pytest.raises(ValueError, match=word):
        write_fov(tmp_path / "fov", **args)
    assert not (tmp_path / "fov" / "fov.tif").exists()


def test_fov_png_yes_no_columns_are_categorical_and_orientation_cyclic(tmp_path):
    """A yes/no column passed as 0/1/NaN floats (as the pipeline does) gets the two categorical colours,
    not a continuous bar; orientation uses the constant-lightness cyclic map (0 deg = 180 deg)."""
    from matplotlib.image import imread

    from map2d.export.fov import YES_NO_COLOURS, _is_yes_no
    from map2d.report.colours import cyclic_colormap

    plane = np.array([[np.nan, 1.0], [0.0, 1.0]])
    assert _is_yes_no("responsive", plane, False) and _is_yes_no("linear", plane, False)
    assert not _is_yes_no("agreement", plane, False) and not _is_yes_no("responsive", plane * 0.5, False)
    cm = cyclic_colormap()
    np.testing.assert_allclose(cm(0.0), cm(1.0 - 1e-9), atol=0.05)
    # big square ROIs: the PNG shows exactly the two categorical colours inside them
    labels = np.zeros((60, 90), int)
    labels[10:50, 5:40], labels[10:50, 50:85] = 1, 2
    paths = write_fov(tmp_path, labels, [1, 2], {"responsive": np.array([1.0, 0.0])})
    img = imread(paths[1])[..., :3]
    colours = {tuple(int(round(255 * v)) for v in px) for px in img.reshape(-1, 3)}
    for hexc in YES_NO_COLOURS:
        rgb = tuple(int(hexc[i:i + 2], 16) for i in (1, 3, 5))
        assert rgb in colours
