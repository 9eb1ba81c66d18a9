"""Washed outputs as other tools read them: pyramids, compression, units, marker names,
display windows and provenance, each checked against an outside reference."""

from __future__ import annotations

import dask.array as da
import numpy as np
import pytest
import tifffile
import zarr
from plexwash.qc.io import OutputSettings, read_levels, read_roi, write_ome_tiff, write_ome_zarr
from plexwash.qc.io import tiff as tiff_module
from plexwash.qc.io.pyramid import halve, level_shapes

TAGS = ["Nd145", "Nd146", "Ir191"]
MARKERS = ["CD3", "CD8", "DNA"]


def _stack(dtype=np.float32, shape=(3, 1100, 1030)):
    rng = np.random.default_rng(7)
    return (rng.random(shape) * 200).astype(dtype)


def _tiff_levels(path):
    with tifffile.TiffFile(path) as tif:
        return [level.asarray() for level in tif.series[0].levels]


def _zarr_levels(path):
    group = zarr.open_group(path, mode="r")
    meta = group.attrs.get("ome", group.attrs)
    return [group[d["path"]][...] for d in meta["multiscales"][0]["datasets"]]


def _check_block_means(levels, dtype):
    """Each level against skimage.transform.downscale_local_mean of the level above
    (reference implementation of the 2 x 2 block mean). Interior: equal (integers: rounded).
    Edge rule (ours): an odd trailing row / column is the mean of the pixels present;
    downscale_local_mean pads with zeros there instead, so the edge is checked directly."""
    from skimage.transform import downscale_local_mean

    for above, below in zip(levels, levels[1:], strict=False):
        ref = downscale_local_mean(above.astype(np.float64), (1, 2, 2))
        n_y, n_x = above.shape[1] // 2, above.shape[2] // 2
        if np.dtype(dtype).kind in "ui":
            ref = np.rint(ref)
        np.testing.assert_allclose(below[:, :n_y, :n_x], ref[:, :n_y, :n_x], rtol=1e-6)
        assert below.shape[1:] == (-(-above.shape[1] // 2), -(-above.shape[2] // 2))
        if above.shape[2] % 2:  # the last column: mean of the one column present
            edge = above[:, : 2 * n_y, -1].astype(np.float64).reshape(above.shape[0], n_y, 2).mean(axis=2)
            edge = np.rint(edge) if np.dtype(dtype).kind in "ui" else edge
            np.testing.assert_allclose(below[:, :n_y, -1], edge, rtol=1e-6)


def test_level_shapes_halve_until_512():
    assert level_shapes((3, 1100, 1030)) == [(3, 1100, 1030), (3, 550, 515), (3, 275, 258)]
    assert level_shapes((1, 512, 400)) == [(1, 512, 400)]
    assert level_shapes((1, 513, 10)) == [(1, 513, 10), (1, 257, 5)]


def test_halve_odd_edges_average_present_pixels():
    band = np.arange(15, dtype=np.float32).reshape(1, 3, 5)
    out = halve(band)
    assert out.shape == (1, 2, 3)
    assert out[0, 0, 2] == pytest.approx((4 + 9) / 2)  # one column present, two rows
    assert out[0, 1, 0] == pytest.approx((10 + 11) / 2)  # one row present, two columns
    assert out[0, 1, 2] == pytest.approx(14)  # the corner: one pixel


@pytest.mark.parametrize("dtype", [np.float32, np.uint16])
def test_ome_tiff_pyramid_in_subifds(tmp_path, dtype):
    stack = _stack(dtype)
    path = write_ome_tiff(tmp_path / "r.ome.tiff", stack, TAGS, pixel_size=(0.5, 0.5))
    with tifffile.TiffFile(path) as tif:
        series = tif.series[0]
        assert len(tif.pages) == 3  # level 0 only in the main chain (OME-TIFF pyramid rule)
        assert len(series.levels) == 3
        assert all(len(page.subifds) == 2 for page in tif.pages)
        assert tif.pages[0].tilewidth == 512 and tif.pages[0].compression == tifffile.COMPRESSION.ADOBE_DEFLATE
    levels = _tiff_levels(path)
    np.testing.assert_array_equal(levels[0], stack)  # level 0 unchanged
    assert [lv.shape for lv in levels] == level_shapes(stack.shape)
    _check_block_means(levels, dtype)
    np.testing.assert_array_equal(read_roi(path).data, stack)  # read_roi reads level 0


def test_big_dask_stack_pyramid_is_staged_and_equal(tmp_path, monkeypatch):
    stack = _stack(np.float32, (2, 1300, 700))
    small = write_ome_tiff(tmp_path / "a.ome.tiff", stack, TAGS[:2])
    monkeypatch.setattr(tiff_module, "IN_MEMORY_WRITE_BYTES", 2**20)  # stage level 0 and level 1
    big = write_ome_tiff(tmp_path / "b.ome.tiff", da.from_array(stack, chunks=(1, 256, 256)), TAGS[:2])
    for a, b in zip(_tiff_levels(small), _tiff_levels(big), strict=True):
        np.testing.assert_array_equal(a, b)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["a.ome.tiff", "b.ome.tiff"]  # no spill left


@pytest.mark.parametrize(("dtype", "ngff"), [(np.float32, "0.5"), (np.uint16, "0.5"), (np.uint16, "0.4")])
def test_ome_zarr_multiscale_validates(tmp_path, dtype, ngff):
    from ome_zarr_models.v04.image import Image as Image04
    from ome_zarr_models.v05.image import Image as Image05

    stack = _stack(dtype)
    path = write_ome_zarr(tmp_path / "r.ome.zarr", stack, TAGS, pixel_size=(0.5, 0.25), labels=MARKERS,
                          settings=OutputSettings(format="ome-zarr", ngff=ngff))
    group = zarr.open_group(path, mode="r")
    assert group.metadata.zarr_format == (2 if ngff == "0.4" else 3)
    # ome-zarr-models validates the NGFF image (metadata and arrays) of the chosen version
    (Image04 if ngff == "0.4" else Image05).from_zarr(group)
    levels = _zarr_levels(path)
    np.testing.assert_array_equal(levels[0], stack)
    _check_block_means(levels, dtype)
    meta = dict(group.attrs) if ngff == "0.4" else group.attrs["ome"]
    scales = [d["coordinateTransformations"][0]["scale"] for d in meta["multiscales"][0]["datasets"]]
    assert scales == [[1.0, 0.5, 0.25], [1.0, 1.0, 0.5], [1.0, 2.0, 1.0]]
    assert group["0"].chunks == (1, 512, 512)
    channels = meta["omero"]["channels"]
    assert [c["label"] for c in channels] == MARKERS
    assert len({c["color"] for c in channels}) == 3  # distinct colours
    for c, plane in zip(channels, levels[-1], strict=True):  # 0.1-99.9 percentile windows
        w = c["window"]
        assert w["start"] == pytest.approx(np.percentile(plane.astype(np.float64), 0.1))
        assert w["end"] == pytest.approx(np.percentile(plane.astype(np.float64), 99.9))
        assert w["min"] <= w["start"] < w["end"] <= w["max"]
    roi = read_roi(path)
    assert roi.channels == tuple(TAGS)  # the tags come back as channel names
    assert roi.labels == tuple(MARKERS)
    assert roi.pixel_size == (pytest.approx(0.5), pytest.approx(0.25))
    assert [lv.shape for lv in read_levels(path)] == level_shapes(stack.shape)


@pytest.mark.parametrize(("choice", "code"), [("zlib", "ADOBE_DEFLATE"), ("zstd", "ZSTD"), ("lzw", "LZW"),
                                              ("none", "NONE")])
def test_compression_choices(tmp_path, choice, code):
    stack = _stack(np.uint16, (2, 600, 600))
    path = write_ome_tiff(tmp_path / "r.ome.tiff", stack, TAGS[:2], settings=OutputSettings(compression=choice))
    with tifffile.TiffFile(path) as tif:  # tifffile reads the TIFF Compression tag (TIFF 6.0)
        assert tif.pages[0].compression == getattr(tifffile.COMPRESSION, code)
        assert tif.pages[0].pages[0].compression == getattr(tifffile.COMPRESSION, code)  # levels too
    np.testing.assert_array_equal(_tiff_levels(path)[0], stack)


@pytest.mark.parametrize(("size", "unit", "micrometres"), [(500.0, "nm", 0.5), (0.5, "µm", 0.5),
                                                           (0.002, "mm", 2.0)])
def test_physical_size_units_round_trip(tmp_path, size, unit, micrometres):
    """Input written by tifffile's OME writer in nm / µm / mm; read in µm; written in µm and
    validated by ome_types against the OME schema (validate=True)."""
    import ome_types

    raw = tmp_path / "raw.ome.tiff"
    tifffile.imwrite(raw, _stack(np.uint16, (2, 64, 64)), ome=True, metadata={
        "axes": "CYX", "Channel": {"Name": TAGS[:2]}, "PhysicalSizeX": size, "PhysicalSizeY": size,
        "PhysicalSizeXUnit": unit, "PhysicalSizeYUnit": unit})
    roi = read_roi(raw)
    assert roi.pixel_size == (pytest.approx(micrometres), pytest.approx(micrometres))
    out = write_ome_tiff(tmp_path / "out.ome.tiff", roi.data, roi.channels, pixel_size=roi.pixel_size)
    with tifffile.TiffFile(out) as tif:
        pixels = ome_types.from_xml(tif.ome_metadata, validate=True).images[0].pixels
    assert pixels.physical_size_x_unit.value == "µm"
    assert pixels.physical_size_x == pytest.approx(micrometres)
    assert read_roi(out).pixel_size == roi.pixel_size
    zout = write_ome_zarr(tmp_path / "out.ome.zarr", roi.data, roi.channels, pixel_size=roi.pixel_size)
    assert read_roi(zout).pixel_size == (pytest.approx(micrometres), pytest.approx(micrometres))


def test_ngff_unit_read_from_axes(tmp_path):
    path = write_ome_zarr(tmp_path / "r.ome.zarr", _stack(np.uint16, (1, 32, 32)), ["Ir191"], pixel_size=(1, 1))
    group = zarr.open_group(path, mode="r+")
    meta = dict(group.attrs["ome"])
    for axis in meta["multiscales"][0]["axes"][1:]:
        axis["unit"] = "nanometer"
    meta["multiscales"][0]["datasets"][0]["coordinateTransformations"][0]["scale"] = [1.0, 250.0, 250.0]
    group.attrs["ome"] = meta
    assert read_roi(path).pixel_size == (pytest.approx(0.25), pytest.approx(0.25))


def test_marker_names_and_provenance_in_ome_xml(tmp_path):
    """OME-XML validated by ome_types against the OME 2016-06 schema (validate=True)."""
    import ome_types

    prov = {"software": "plexwash", "input_sha256": "a" * 64, "recipe_sha256": "b" * 64}
    path = write_ome_tiff(tmp_path / "r.ome.tiff", _stack(np.uint16, (3, 40, 40)), TAGS, labels=MARKERS,
                          provenance=prov)
    with tifffile.TiffFile(path) as tif:
        ome = ome_types.from_xml(tif.ome_metadata, validate=True)
    pixels = ome.images[0].pixels
    assert [c.name for c in pixels.channels] == MARKERS
    assert len({c.color.as_rgb_tuple() for c in pixels.channels}) == 3
    maps = {a.namespace: {m.k: m.value for m in a.value.ms} for a in ome.structured_annotations.map_annotations}
    assert maps["plexwash.channel-tags"] == {f"Channel:0:{i}": t for i, t in enumerate(TAGS)}
    assert maps["plexwash.provenance"] == prov
    roi = read_roi(path)
    assert roi.channels == tuple(TAGS) and roi.labels == tuple(MARKERS)


def test_wash_writes_provenance(tmp_path):
    from plexwash.qc.wash import wash_to_file

    raw = write_ome_tiff(tmp_path / "raw.ome.tiff", _stack(np.float32, (3, 48, 48)), TAGS)
    out = tmp_path / "out" / "r.ome.zarr"
    import dataclasses

    from plexwash.qc.recipe import default_recipe

    recipe = default_recipe()
    recipe = dataclasses.replace(recipe, output=OutputSettings(format="ome-zarr"))
    wash_to_file(read_roi(raw), out, recipe, provenance={"input_sha256": "c" * 64})
    prov = zarr.open_group(out, mode="r").attrs["plexwash"]["provenance"]
    assert prov["input_sha256"] == "c" * 64 and prov["software"] == "plexwash"
    assert prov["version"] and prov["date"]


def test_independent_reader_opens_both(tmp_path):
    """bioio (general-purpose reader, with its OME-TIFF and OME-Zarr plugins) sees the
    dimensions, channel count and marker names."""
    bioio = pytest.importorskip("bioio")
    stack = _stack(np.uint16, (3, 1100, 1030))
    tiff = write_ome_tiff(tmp_path / "r.ome.tiff", stack, TAGS, labels=MARKERS, pixel_size=(0.5, 0.5))
    zpath = write_ome_zarr(tmp_path / "r.ome.zarr", stack, TAGS, labels=MARKERS, pixel_size=(0.5, 0.5))
    for path in (tiff, zpath):
        image = bioio.BioImage(path)
        assert image.dims.C == 3 and image.dims.Y == 1100 and image.dims.X == 1030
        assert list(image.channel_names) == MARKERS
        assert image.physical_pixel_sizes.X == pytest.approx(0.5)
        np.testing.assert_array_equal(np.asarray(image.get_image_data("CYX")), stack)


@pytest.mark.parametrize("name", ["r.ome.tiff", "r.ome.zarr"])
def test_studio_reader_opens_pyramids_as_multiscale_layers(tmp_path, name):
    from plexwash.plugin import _reader

    stack = _stack(np.uint16, (2, 1100, 600))
    path = write_ome_zarr if name.endswith("zarr") else write_ome_tiff
    path = path(tmp_path / name, stack, TAGS[:2], labels=MARKERS[:2])
    layers = _reader.napari_get_reader(str(path))(str(path))
    assert [kw["name"] for _, kw, _ in layers] == MARKERS[:2]
    for i, (data, kwargs, kind) in enumerate(layers):
        assert kind == "image" and kwargs["multiscale"] is True
        assert [tuple(level.shape) for level in data] == [(1100, 600), (550, 300), (275, 150)]
        np.testing.assert_array_equal(np.asarray(data[0]), stack[i])


def test_acquisition_metadata_carried_over(tmp_path):
    """The input's instrument, objective and acquisition date reach the washed OME-TIFF; the
    result validates against the OME schema (ome_types, validate=True)."""
    from datetime import datetime

    import ome_types
    from ome_types.model import (
        OME,
        Image,
        Instrument,
        InstrumentRef,
        Objective,
        ObjectiveSettings,
        Pixels,
    )
    from plexwash.qc.wash import wash_to_file

    source = ome_types.to_xml(OME(
        instruments=[Instrument(id="Instrument:0", objectives=[
            Objective(id="Objective:0:0", nominal_magnification=20.0, model="Plan 20x")])],
        images=[Image(id="Image:0", acquisition_date=datetime(2024, 1, 2, 3, 4, 5),
                      instrument_ref=InstrumentRef(id="Instrument:0"),
                      objective_settings=ObjectiveSettings(id="Objective:0:0"),
                      pixels=Pixels(id="Pixels:0", dimension_order="XYCZT", type="float", size_c=3,
                                    size_x=48, size_y=48, size_z=1, size_t=1))]))
    raw = write_ome_tiff(tmp_path / "raw.ome.tiff", _stack(np.float32, (3, 48, 48)), TAGS, source_xml=source)
    out = wash_to_file(read_roi(raw), tmp_path / "out" / "r.ome.tiff").output
    with tifffile.TiffFile(out) as tif:
        ome = ome_types.from_xml(tif.ome_metadata, validate=True)
    image = ome.images[0]
    assert image.acquisition_date == datetime(2024, 1, 2, 3, 4, 5)
    assert ome.instruments[0].objectives[0].model == "Plan 20x"
    assert image.instrument_ref.id == "Instrument:0" and image.objective_settings.id == "Objective:0:0"
    maps = {a.namespace: {m.k: m.value for m in a.value.ms} for a in ome.structured_annotations.map_annotations}
    assert maps["plexwash.provenance"]["software"] == "plexwash"
