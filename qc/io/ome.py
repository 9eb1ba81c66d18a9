"""Metadata written with every washed stack: OME-XML for OME-TIFF, and what it shares with OME-Zarr.

Choices (kept the same in both formats):

* A channel's ``Name`` (OME-XML) and ``label`` (NGFF ``omero.channels``) is its readable
  marker name (the stain sheet's ``marker``), which is what viewers show; the acquisition tag
  is kept beside it (OME-XML: a ``MapAnnotation`` in namespace ``CHANNEL_TAGS``, key the
  channel's ID; OME-Zarr: ``plexwash.channels``), and plexwash reads the tags back as the
  channel names, so a washed stack matches its stain sheet as the raw one did.
* Physical pixel sizes are written in micrometres (read in any length unit and converted).
* Provenance (tool, version, hashes, date) is a ``MapAnnotation`` in namespace
  ``PROVENANCE`` linked to the image (OME-Zarr: ``plexwash.provenance``).
* Display windows are the 0.1 and 99.9 percentiles of each channel of the smallest
  resolution level; colours cycle through ``COLOURS``.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np

#: Namespace of the map from channel IDs to acquisition tags.
CHANNEL_TAGS = "plexwash.channel-tags"
#: Namespace of the provenance map.
PROVENANCE = "plexwash.provenance"
#: Channel display colours (RGB hex), distinct for the first eight channels.
COLOURS = ("0000FF", "00FF00", "FF0000", "FF00FF", "00FFFF", "FFFF00", "FF8000", "FFFFFF")
#: Display window percentiles (common practice).
WINDOW_PERCENTILES = (0.1, 99.9)

#: Micrometres per OME / NGFF length unit (SI prefixes; OME UnitsLength, NGFF axes units).
MICROMETRES = {
    "pm": 1e-6, "picometer": 1e-6, "Å": 1e-4, "angstrom": 1e-4, "nm": 1e-3, "nanometer": 1e-3,
    "µm": 1.0, "um": 1.0, "micrometer": 1.0, "micron": 1.0, "mm": 1e3, "millimeter": 1e3,
    "cm": 1e4, "centimeter": 1e4, "m": 1e6, "meter": 1e6,
}

_PIXEL_TYPES = {"uint8": "uint8", "uint16": "uint16", "uint32": "uint32", "int8": "int8",
                "int16": "int16", "int32": "int32", "float32": "float", "float64": "double"}


def to_micrometres(value, unit: str | None) -> float | None:
    """A physical length in micrometres; None for a unit that is not a length.

    OME-XML's default unit (no ``PhysicalSizeXUnit``) is the micrometre (OME schema).

    Examples
    --------
    >>> to_micrometres("500", "nm"), to_micrometres(1, None), to_micrometres(2, "mm")
    (0.5, 1.0, 2000.0)
    """
    factor = MICROMETRES.get("µm" if unit is None else str(unit).strip())
    if factor is None or value is None:
        return None
    return float(value) * factor


def display_windows(smallest) -> list[dict]:
    """NGFF ``omero`` windows per channel from the smallest resolution level."""
    windows = []
    for plane in np.asarray(smallest):
        plane = plane.astype(np.float64)
        start, end = (float(v) for v in np.percentile(plane, WINDOW_PERCENTILES))
        low, high = float(plane.min()), float(plane.max())
        if end <= start:
            end = start + 1.0
        windows.append({"min": min(low, start), "max": max(high, end), "start": start, "end": end})
    return windows


def ome_xml(name: str, shape, dtype, channels: Sequence[str], labels: Sequence[str],
            pixel_size=None, provenance: Mapping[str, str] | None = None,
            source_xml: str | None = None) -> str:
    """OME-XML (7-bit ASCII) for a C x Y x X stack stored one plane per IFD, channel order.

    ``source_xml``, the input's OME-XML, lends its instruments and its first image's
    acquisition date, description, instrument and objective settings (what the OME model
    keeps about the acquisition); annotation links inside the instruments are dropped,
    as the annotations are not carried.
    """
    from ome_types import to_xml
    from ome_types.model import (
        OME,
        AnnotationRef,
        Channel,
        Image,
        Map,
        MapAnnotation,
        Pixels,
        StructuredAnnotations,
        TiffData,
    )

    n_c, n_y, n_x = (int(n) for n in shape)
    sizes = {}
    if pixel_size is not None:
        sizes = {"physical_size_y": float(pixel_size[0]), "physical_size_x": float(pixel_size[1]),
                 "physical_size_y_unit": "µm", "physical_size_x_unit": "µm"}
    tags = MapAnnotation(id="Annotation:0", namespace=CHANNEL_TAGS, value=Map(ms=[
        Map.M(k=f"Channel:0:{i}", value=str(c)) for i, c in enumerate(channels)]))
    annotations = [tags]
    refs = [AnnotationRef(id=tags.id)]
    if provenance:
        prov = MapAnnotation(id="Annotation:1", namespace=PROVENANCE, value=Map(ms=[
            Map.M(k=str(k), value=str(v)) for k, v in provenance.items()]))
        annotations.append(prov)
        refs.append(AnnotationRef(id=prov.id))
    pixels = Pixels(
        id="Pixels:0", dimension_order="XYCZT", type=_PIXEL_TYPES[np.dtype(dtype).name],
        size_c=n_c, size_y=n_y, size_x=n_x, size_z=1, size_t=1, **sizes,
        channels=[Channel(id=f"Channel:0:{i}", name=str(label), samples_per_pixel=1,
                          color=_rgba(COLOURS[i % len(COLOURS)]))
                  for i, label in enumerate(labels)],
        tiff_data_blocks=[TiffData(ifd=i, first_c=i, first_z=0, first_t=0, plane_count=1)
                          for i in range(n_c)],
    )
    image = Image(id="Image:0", name=name, pixels=pixels, annotation_refs=refs)
    ome = OME(images=[image], structured_annotations=StructuredAnnotations(map_annotations=annotations),
              creator=f"plexwash {provenance.get('version', '') if provenance else ''}".strip())
    _carry_acquisition(ome, image, source_xml)
    xml = '<?xml version="1.0" encoding="UTF-8"?>\n' + to_xml(ome)
    return xml.encode("ascii", "xmlcharrefreplace").decode("ascii")


def _carry_acquisition(ome, image, source_xml: str | None) -> None:
    """Copy the instruments and acquisition fields of the input's OME-XML (when it parses)."""
    import warnings

    from ome_types import from_xml

    if not source_xml:
        return
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            source = from_xml(source_xml, validate=False)
    except Exception:  # the input's metadata was read already; what cannot be parsed is not carried
        return
    if not source.images:
        return
    first = source.images[0]
    ome.instruments = list(source.instruments)
    for instrument in ome.instruments:
        parts = [instrument, instrument.microscope, *instrument.objectives, *instrument.detectors,
                 *instrument.filters, *instrument.filter_sets, *instrument.dichroics,
                 *instrument.light_source_group]
        for part in parts:
            if part is not None and hasattr(part, "annotation_refs"):
                part.annotation_refs = []
    image.acquisition_date = first.acquisition_date
    image.description = first.description
    known = {i.id for i in ome.instruments}
    if first.instrument_ref is not None and first.instrument_ref.id in known:
        image.instrument_ref = first.instrument_ref
        image.objective_settings = first.objective_settings


def _rgba(hex_rgb: str) -> int:
    """OME Color: a signed 32-bit RGBA integer (OME schema), opaque."""
    value = (int(hex_rgb, 16) << 8) | 0xFF
    return value - 2**32 if value >= 2**31 else value
