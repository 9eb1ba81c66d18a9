"""Reading and writing ROIs: formats, round trips checked by outside readers, bad input."""

from __future__ import annotations

import json
import os
import stat
import warnings

import dask.array as da
import numpy as np
import pytest
import tifffile
import zarr
from plexwash.qc.errors import InputError
from plexwash.qc.files import check_output
from plexwash.qc.io import (
    OutputSettings,
    list_cohort,
    read_roi,
    read_stains,
    sha256_path,
    write_ome_tiff,
    write_ome_zarr,
)
from plexwash.qc.io import roi as roi_module
from plexwash.qc.io import tiff as tiff_module

NAMES = ["Nd145", "Nd146", "Ir191"]


# ----------------------------------------------------------------- OME-TIFF round trip


def test_schema_validation_rejects_what_parsing_alone_accepts(tmp_path):
    """The check above can fail: with validate=True, ome_types refuses an attribute the
    OME 2016-06 schema does not define and an ID outside its pattern; without it, both pass."""
    import ome_types

    path = write_ome_tiff(tmp_path / "r.ome.tiff", np.zeros((3, 16, 16), np.uint8), NAMES)
    with tifffile.TiffFile(path) as tif:
        xml = tif.ome_metadata
    ome_types.from_xml(xml, validate=True)
    unknown = xml.replace("<Pixels ", '<Pixels Unknown="1" ', 1)
    bad_id = xml.replace('ID="Image:0"', 'ID="not an id"', 1)
    assert unknown != xml and bad_id != xml
    for text in (unknown, bad_id):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # ome_types warns as it recasts the bad ID
            ome_types.from_xml(text, validate=False)  # parsing alone accepts it
        with pytest.raises(ValueError, match="Validation of"):  # ome_types' ValidationError
            ome_types.from_xml(text, validate=True)


def _source_with_acquisition(**image):
    import ome_types
    from ome_types.model import (
        OME,
        AnnotationRef,
        Detector,
        Image,
        Instrument,
        InstrumentRef,
        Map,
        MapAnnotation,
        Objective,
        ObjectiveSettings,
        Pixels,
        StructuredAnnotations,
    )

    return ome_types.to_xml(OME(
        instruments=[Instrument(id="Instrument:0", detectors=[Detector(id="Detector:0", model="d")],
                                objectives=[Objective(id="Objective:0:0", model="Plan 20x",
                                                      annotation_refs=[AnnotationRef(id="Annotation:5")])])],
        images=[Image(id="Image:0", instrument_ref=InstrumentRef(id="Instrument:0"),
                      objective_settings=ObjectiveSettings(id="Objective:0:0"), **image,
                      pixels=Pixels(id="Pixels:0", dimension_order="XYCZT", type="float", size_c=1,
                                    size_x=8, size_y=8, size_z=1, size_t=1))],
        structured_annotations=StructuredAnnotations(map_annotations=[
            MapAnnotation(id="Annotation:5", value=Map(ms=[]))])))


@pytest.mark.parametrize("source", ["none", "acquisition", "unparsable"])
def test_ome_xml_text_equals_the_ome_types_model(source):
    """The OME-XML written as text is the document ome_types' model serialises (reference:
    ome_types, the OME 2016-06 schema's model, validate=True), acquisition carried or not."""
    from datetime import datetime

    import ome_types
    from plexwash.qc.io.ome import ome_xml, ome_xml_via_model

    source_xml = {"none": None, "unparsable": "<OME",
                  "acquisition": _source_with_acquisition(acquisition_date=datetime(2024, 1, 2, 3, 4, 5),
                                                          description="tissue & glass")}[source]
    args = ("roi <1>", (3, 20, 30), np.dtype(np.float32), NAMES, ["CD45", 'a "b" & µ', "DNA"],
            (0.8, 0.5), {"software": "plexwash", "version": "1", "note": "x<y & z"}, source_xml)
    text, model = ome_xml(*args), ome_xml_via_model(*args)
    assert text.isascii()
    assert ome_types.from_xml(text, validate=True) == ome_types.from_xml(model, validate=True)


def test_ome_xml_of_another_schema_version_goes_through_the_model():
    from plexwash.qc.io.ome import ome_xml, ome_xml_via_model

    older = _source_with_acquisition(description="d").replace("OME/2016-06", "OME/2015-01")
    args = ("r", (1, 8, 8), np.dtype(np.uint16), ["A"], ["A"], None, None, older)
    assert ome_xml(*args) == ome_xml_via_model(*args)


@pytest.mark.parametrize("dtype", [np.uint8, np.uint16, np.float32])
def test_ome_tiff_round_trip_parsed_by_ome_types(tmp_path, dtype):
    rng = np.random.default_rng(1)
    stack = rng.integers(0, 200, size=(3, 70, 90)).astype(dtype)
    path = tmp_path / "r.ome.tiff"
    write_ome_tiff(path, stack, NAMES, pixel_size=(0.8, 0.5))
    # Outside reader 1: tifffile reads back the same pixels with the CYX axes.
    with tifffile.TiffFile(path) as tif:
        assert tif.is_ome
        assert tif.series[0].axes == "CYX"
        assert tif.pages[0].is_tiled
        assert tif.pages[0].compression == tifffile.COMPRESSION.ADOBE_DEFLATE  # deflate by default
        np.testing.assert_array_equal(tif.asarray(), stack)
        xml = tif.ome_metadata
    # Outside reader 2: ome-types validates the OME-XML against the OME 2016-06 XML schema
    # (validate=True; without it ome_types only parses) and parses it.
    import ome_types

    ome = ome_types.from_xml(xml, validate=True)
    pixels = ome.images[0].pixels
    assert [c.name for c in pixels.channels] == NAMES
    assert pixels.physical_size_x == pytest.approx(0.5)
    assert pixels.physical_size_y == pytest.approx(0.8)
    roi = read_roi(path)
    assert roi.channels == tuple(NAMES)
    assert roi.pixel_size == (pytest.approx(0.8), pytest.approx(0.5))
    assert roi.data.dtype == dtype
    np.testing.assert_array_equal(roi.data, stack)


def test_reads_stripped_and_tiled_ome_tiff_written_by_tifffile(tmp_path, small_stack):
    for tile in (None, (32, 32)):
        path = tmp_path / f"t{tile is None}.ome.tiff"
        tifffile.imwrite(path, small_stack, ome=True, photometric="minisblack", tile=tile,
                         metadata={"axes": "CYX", "Channel": {"Name": NAMES}})
        roi = read_roi(path)
        assert roi.channels == tuple(NAMES)
        np.testing.assert_array_equal(roi.data, small_stack)


def test_big_stacks_read_lazily_as_dask(tmp_path, small_stack, monkeypatch):
    path = tmp_path / "big.ome.tiff"
    write_ome_tiff(path, small_stack, NAMES)
    monkeypatch.setattr(roi_module, "LAZY_BYTES", 100)
    roi = read_roi(path)
    assert isinstance(roi.data, da.Array)
    np.testing.assert_array_equal(roi.data.compute(), small_stack)


@pytest.mark.parametrize("dtype", [np.float32, np.uint16, np.int32, np.float64])
def test_big_dask_stack_written_through_a_staging_file_matches(tmp_path, small_stack, monkeypatch, dtype):
    """A dask stack over IN_MEMORY_WRITE_BYTES is computed into a StagedStack of its own
    pixel type beside the output and written from it band by band: same pixels, bit for
    bit (float64 values that float32 cannot hold included), and nothing left behind."""
    from plexwash.qc.io.staged import StagedStack

    made = []

    class Spy(StagedStack):
        def __init__(self, *args, **kwargs):
            super().__init__(*args, **kwargs)
            made.append((self.path.parent.parent, self.path.parent.name, self.dtype))

    monkeypatch.setattr(tiff_module, "StagedStack", Spy)
    monkeypatch.setattr(tiff_module, "IN_MEMORY_WRITE_BYTES", 10)
    stack = small_stack.astype(dtype) * 2
    if dtype == np.float64:
        stack += 1e-9  # not representable in float32
    lazy = da.from_array(stack, chunks=(3, 20, 17))  # chunks span channels and cut rows
    path = tmp_path / "w.ome.tiff"
    write_ome_tiff(path, lazy, NAMES, settings=OutputSettings(tile=64))
    back = tifffile.imread(path)
    assert back.dtype == np.dtype(dtype)
    np.testing.assert_array_equal(back, stack)
    assert [(m[0], m[1].startswith(".w.ome.tiff.spill-"), m[2]) for m in made] == [
        (tmp_path, True, np.dtype(dtype))]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["w.ome.tiff"]  # no temporary left


def test_pyramid_of_a_store_is_staged_and_equals_the_in_memory_one(tmp_path, monkeypatch):
    """A stack written from a store (a staged stack: the staged wash) stages its pyramid
    levels over STORE_LEVEL_BYTES beside the output too, instead of holding them in memory;
    every level is bit for bit that of the same stack written from memory."""
    from plexwash.qc.io import read_levels
    from plexwash.qc.io.staged import StagedStack

    rng = np.random.default_rng(2)
    stack = rng.poisson(3.0, size=(3, 1100, 700)).astype(np.float32)  # 2 levels below level 0
    made = []

    class Spy(StagedStack):
        def __init__(self, *args, **kwargs):
            super().__init__(*args, **kwargs)
            made.append(self.shape)

    with StagedStack(tmp_path / "source.f32", stack.shape) as source:
        source[:] = stack
        monkeypatch.setattr(tiff_module, "StagedStack", Spy)
        monkeypatch.setattr(tiff_module, "STORE_LEVEL_BYTES", 1000)
        write_ome_tiff(tmp_path / "store.ome.tiff", source, NAMES[:3], settings=OutputSettings(tile=256))
    assert made == [(3, 550, 350), (3, 275, 175)]  # both levels staged, level 0 read from the store
    write_ome_tiff(tmp_path / "memory.ome.tiff", stack, NAMES[:3], settings=OutputSettings(tile=256))
    got, want = read_levels(tmp_path / "store.ome.tiff"), read_levels(tmp_path / "memory.ome.tiff")
    assert len(got) == len(want) == 3
    for a, b in zip(got, want, strict=True):
        np.testing.assert_array_equal(np.asarray(a), np.asarray(b))
    assert sorted(p.name for p in tmp_path.iterdir()) == ["memory.ome.tiff", "source.f32", "store.ome.tiff"]


def test_small_dask_stack_written_in_memory(tmp_path, small_stack, monkeypatch):
    def refuse(*args, **kwargs):
        raise AssertionError("a small stack needs no staging file")

    monkeypatch.setattr(tiff_module, "StagedStack", refuse)
    write_ome_tiff(tmp_path / "s.ome.tiff", da.from_array(small_stack, chunks=(1, 32, 32)), NAMES)
    np.testing.assert_array_equal(tifffile.imread(tmp_path / "s.ome.tiff"), small_stack)


def test_plain_multipage_tiff_with_stains(tmp_path, small_stack):
    path = tmp_path / "plain.tiff"
    tifffile.imwrite(path, small_stack, photometric="minisblack")
    stains = tmp_path / "stains.csv"
    stains.write_text("tag,marker,wash\nNd145,membrane-A,yes\nNd146,nuclear-B,yes\nIr191,DNA,no\n")
    roi = read_roi(path, stains=stains)
    assert roi.channels == tuple(NAMES)
    assert roi.labels == ("membrane-A", "nuclear-B", "DNA")
    assert roi.use == (True, True, False)
    np.testing.assert_array_equal(roi.data, small_stack)


def test_stains_reorders_labels_to_ome_channel_order(tmp_path, small_roi):
    stains = tmp_path / "stains.csv"
    stains.write_text("tag,marker,wash\nIr191,DNA,no\nNd145,A,yes\nNd146,B,yes\n")
    roi = read_roi(small_roi, stains=stains)
    assert roi.labels == ("A", "B", "DNA")
    assert roi.use == (True, True, False)


# ----------------------------------------------------------------- OME-Zarr


def test_ome_zarr_written_validates_against_ngff_05(tmp_path, small_stack):
    path = tmp_path / "r.ome.zarr"
    write_ome_zarr(path, da.from_array(small_stack, chunks=(3, 32, 32)), NAMES, pixel_size=(0.5, 0.5))
    # Outside reference: ome-zarr-models validates the NGFF 0.5 image metadata.
    from ome_zarr_models.v05.image import Image

    image = Image.from_zarr(zarr.open_group(path, mode="r"))
    ome = image.attributes.ome
    assert ome.version == "0.5"
    assert [a.name for a in ome.multiscales[0].axes] == ["c", "y", "x"]
    assert [c["label"] for c in ome.omero["channels"]] == NAMES
    roi = read_roi(path)
    assert roi.channels == tuple(NAMES)
    assert roi.pixel_size == (0.5, 0.5)
    np.testing.assert_array_equal(np.asarray(roi.data), small_stack)


def test_reads_ngff_04_layout(tmp_path, small_stack):
    path = tmp_path / "old.ome.zarr"
    group = zarr.open_group(path, mode="w", zarr_format=2)
    arr = group.create_array("0", shape=small_stack.shape, dtype=small_stack.dtype, chunks=(1, 32, 32))
    arr[...] = small_stack
    # NGFF 0.4 keeps multiscales and omero at the top of .zattrs (ngff.openmicroscopy.org/0.4).
    group.attrs.update({
        "multiscales": [{"version": "0.4", "axes": [{"name": "c", "type": "channel"},
                                                     {"name": "y", "type": "space"},
                                                     {"name": "x", "type": "space"}],
                         "datasets": [{"path": "0", "coordinateTransformations":
                                       [{"type": "scale", "scale": [1, 2.0, 2.0]}]}]}],
        "omero": {"channels": [{"label": n} for n in NAMES]},
    })
    roi = read_roi(path)
    assert roi.channels == tuple(NAMES)
    assert roi.pixel_size == (2.0, 2.0)
    np.testing.assert_array_equal(np.asarray(roi.data), small_stack)


# ----------------------------------------------------------------- bad input


def check_error(problem: str, func, *args, **kwargs):
    with pytest.raises(InputError) as info:
        func(*args, **kwargs)
    assert problem in info.value.problem, info.value.problem
    return info.value


def test_missing_file(tmp_path):
    err = check_error("not found", read_roi, tmp_path / "nope.ome.tiff")
    assert err.path.endswith("nope.ome.tiff")


def test_empty_file(tmp_path):
    path = tmp_path / "empty.ome.tiff"
    path.touch()
    check_error("empty", read_roi, path)


def test_not_a_tiff(tmp_path):
    path = tmp_path / "notes.tiff"
    path.write_text("these are not pixels")
    check_error("not a readable TIFF", read_roi, path)


@pytest.mark.parametrize("keep", [0.9, 0.5, 0.2])
def test_truncated_file_detected(tmp_path, small_stack, keep):
    full = tmp_path / "full.ome.tiff"
    write_ome_tiff(full, small_stack, NAMES)
    data = full.read_bytes()
    cut = tmp_path / "cut.ome.tiff"
    cut.write_bytes(data[: int(len(data) * keep)])
    check_error("truncated", read_roi, cut)


def test_one_channel_image_reads_as_a_one_channel_stack(tmp_path, small_stack):
    path = tmp_path / "flat.ome.tiff"
    tifffile.imwrite(path, small_stack[0], ome=True, photometric="minisblack", metadata={"axes": "YX"})
    roi = read_roi(path)
    assert roi.shape == (1, *small_stack.shape[1:]) and len(roi.channels) == 1
    np.testing.assert_array_equal(np.asarray(roi.data[0]), small_stack[0])


def test_unknown_axes_refused(tmp_path):
    path = tmp_path / "zstack.ome.tiff"
    tifffile.imwrite(path, np.zeros((2, 3, 16, 16), np.uint16), ome=True, photometric="minisblack",
                     metadata={"axes": "ZCYX"})
    check_error("unsupported axes", read_roi, path)


def test_stains_not_matching_channels(tmp_path, small_roi):
    stains = tmp_path / "stains.csv"
    stains.write_text("tag,marker,wash\nNd145,A,yes\nSm147,B,yes\nIr191,DNA,yes\n")
    err = check_error("do not match", read_roi, small_roi, stains=stains)
    assert "Sm147" in err.problem and "Nd146" in err.problem
    assert err.path.endswith("stains.csv")


def test_stains_with_wrong_count_for_plain_tiff(tmp_path, small_stack):
    path = tmp_path / "plain.tiff"
    tifffile.imwrite(path, small_stack, photometric="minisblack")
    stains = tmp_path / "stains.csv"
    stains.write_text("tag,marker,wash\nNd145,A,yes\nNd146,B,yes\n")
    check_error("lists 2 channels", read_roi, path, stains=stains)


def test_plain_tiff_without_stains(tmp_path, small_stack):
    path = tmp_path / "plain.tiff"
    tifffile.imwrite(path, small_stack, photometric="minisblack")
    check_error("--stains", read_roi, path)


@pytest.mark.parametrize("text, problem", [
    ("channel,label\nNd145,A\n", "missing column"),
    ("tag,marker,wash\nNd145,A,maybe\n", "wash must be"),
    ("tag,marker,wash\nNd145,A,yes\nNd145,B,yes\n", "duplicate tag"),
    ("", "empty"),
])
def test_bad_stains(tmp_path, text, problem):
    stains = tmp_path / "stains.csv"
    stains.write_text(text)
    check_error(problem, read_stains, stains)


def test_duplicate_channel_names(tmp_path, small_stack):
    path = tmp_path / "dup.ome.tiff"
    write_ome_tiff(path, small_stack, ["Nd145", "Nd145", "Ir191"])
    err = check_error("duplicate channel", read_roi, path)
    assert "Nd145" in err.problem


@pytest.mark.parametrize("lazy", [False, True])
def test_non_finite_pixels_refused_with_count(tmp_path, small_stack, lazy):
    stack = small_stack.copy()
    stack[0, 3, 4] = np.nan
    stack[2, 10, 11] = np.inf
    stack[1, 0, 0] = -np.inf
    path = tmp_path / "nan.ome.tiff"
    write_ome_tiff(path, stack, NAMES)
    err = check_error("3 pixel(s) are NaN or Inf", read_roi, path, lazy=lazy)
    assert err.path == str(path)


def test_output_equal_to_input_refused(small_roi):
    check_error("is an input", check_output, small_roi, [small_roi])
    other = small_roi.parent / "." / small_roi.name
    check_error("is an input", check_output, other, [small_roi])


@pytest.mark.skipif(os.geteuid() == 0, reason="root can write into read-only folders")
def test_unwritable_output_folder_non_root(tmp_path):
    locked = tmp_path / "locked"
    locked.mkdir()
    locked.chmod(stat.S_IRUSR | stat.S_IXUSR)
    try:
        check_error("not writable", check_output, locked / "out.ome.tiff")
    finally:
        locked.chmod(stat.S_IRWXU)


def test_unwritable_output_folder(tmp_path):
    # /proc refuses new files even to root (Linux procfs), so this runs everywhere.
    check_error("not writable", check_output, "/proc/plexwash-out/out.ome.tiff")


def test_output_under_a_file_refused(tmp_path, small_roi):
    # Even root cannot create a folder below a regular file: always testable.
    check_error("is not a folder", check_output, small_roi / "sub" / "out.ome.tiff")


def test_inputs_are_never_modified(tmp_path, small_roi):
    before = sha256_path(small_roi)
    roi = read_roi(small_roi)
    write_ome_tiff(tmp_path / "copy.ome.tiff", np.asarray(roi.data) + 1, roi.channels)
    assert sha256_path(small_roi) == before


def test_list_cohort_sorted_and_filtered(tmp_path, small_stack):
    for name in ["b.ome.tiff", "a.ome.tiff"]:
        write_ome_tiff(tmp_path / name, small_stack, NAMES)
    (tmp_path / "notes.txt").write_text("x")
    assert [p.name for p in list_cohort(tmp_path)] == ["a.ome.tiff", "b.ome.tiff"]
    empty = tmp_path / "empty"
    empty.mkdir()
    check_error("no ROI found", list_cohort, empty)


def test_sha256_of_folder_changes_with_content(tmp_path, small_stack):
    path = tmp_path / "r.ome.zarr"
    write_ome_zarr(path, small_stack, NAMES)
    first = sha256_path(path)
    write_ome_zarr(path, small_stack + 1, NAMES)
    assert sha256_path(path) != first
    # hashlib is the reference for single files
    import hashlib

    meta = path / "zarr.json"
    assert sha256_path(meta) == hashlib.sha256(meta.read_bytes()).hexdigest()
    assert json.loads(meta.read_text())["attributes"]["ome"]["version"] == "0.5"


@pytest.mark.parametrize("shape", [(3, 40, 56), (40, 56)], ids=["stack", "one-channel"])
def test_a_tiff_read_into_memory_equals_its_lazy_read(tmp_path, shape):
    """An ROI read into memory is decoded whole by tifffile (no zarr view); its pixels,
    dtype and shape equal those of the lazy read chunk by chunk (tifffile's zarr store)."""
    rng = np.random.default_rng(5)
    data = rng.poisson(3.0, shape).astype(np.uint16)
    path = tmp_path / "a.ome.tiff"
    axes = "CYX" if len(shape) == 3 else "YX"
    tifffile.imwrite(path, data, ome=True, photometric="minisblack", tile=(16, 16),
                     compression="zlib", metadata={"axes": axes, "Channel": {"Name": NAMES[:len(data)]}
                                                   if len(shape) == 3 else {"Name": ["Nd145"]}})
    eager = read_roi(path)
    lazy = read_roi(path, lazy=True)
    assert isinstance(eager.data, np.ndarray) and isinstance(lazy.data, da.Array)
    assert eager.data.dtype == lazy.data.dtype and eager.data.shape == lazy.data.shape
    np.testing.assert_array_equal(eager.data, lazy.data.compute())
    assert eager.channels == lazy.channels


def test_source_xml_kept_from_the_read_is_the_files_own_and_follows_a_replaced_file(tmp_path):
    path = tmp_path / "roi.ome.tiff"
    data = np.arange(2 * 8 * 8, dtype=np.float32).reshape(2, 8, 8)
    write_ome_tiff(path, data, ["Ir191", "Pt195"])
    read_roi(path)  # keeps the XML it read
    with tifffile.TiffFile(path) as tif:  # the file's own OME-XML (tifffile reference reader)
        assert tiff_module.source_ome_xml(path) == tif.ome_metadata
    other = tmp_path / "other.ome.tiff"
    write_ome_tiff(other, data, ["Yb171", "Lu175"])
    os.replace(other, path)  # a different file under the same name: read again
    with tifffile.TiffFile(path) as tif:
        assert tiff_module.source_ome_xml(path) == tif.ome_metadata
    assert "Yb171" in tiff_module.source_ome_xml(path)
