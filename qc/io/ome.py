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


#: The OME schema the XML is written in.
OME_NAMESPACE = "http://www.openmicroscopy.org/Schemas/OME/2016-06"
_XSI = "http://www.w3.org/2001/XMLSchema-instance"


def ome_xml(name: str, shape, dtype, channels: Sequence[str], labels: Sequence[str],
            pixel_size=None, provenance: Mapping[str, str] | None = None,
            source_xml: str | None = None) -> str:
    """OME-XML (7-bit ASCII) for a C x Y x X stack stored one plane per IFD, channel order.

    ``source_xml``, the input's OME-XML, lends its instruments and its first image's
    acquisition date, description, instrument and objective settings (what the OME model
    keeps about the acquisition); annotation links inside the instruments are dropped,
    as the annotations are not carried.

    Written as text in the OME 2016-06 schema's element order (what ``ome_types`` would
    serialise for the same model, without loading it: its import alone costs more than
    a small ROI's wash). A source in another schema version, or with elements in other
    namespaces, goes through ``ome_types``' model instead (:func:`ome_xml_via_model`).
    """
    carried = _acquisition_elements(source_xml)
    if carried is None:
        return ome_xml_via_model(name, shape, dtype, channels, labels, pixel_size, provenance,
                                 source_xml)
    instruments, image_parts = carried
    n_c, n_y, n_x = (int(n) for n in shape)
    creator = f"plexwash {provenance.get('version', '') if provenance else ''}".strip()
    out = ['<?xml version="1.0" encoding="UTF-8"?>\n',
           f'<OME xmlns="{OME_NAMESPACE}" xmlns:xsi="{_XSI}" '
           f'xsi:schemaLocation="{OME_NAMESPACE} {OME_NAMESPACE}/ome.xsd" Creator={_attr(creator)}>']
    out.extend(instruments)
    out.append(f'<Image ID="Image:0" Name={_attr(name)}>')
    out.extend(image_parts)
    sizes = ""
    if pixel_size is not None:
        sizes = (f' PhysicalSizeX="{float(pixel_size[1])!r}" PhysicalSizeXUnit="µm"'
                 f' PhysicalSizeY="{float(pixel_size[0])!r}" PhysicalSizeYUnit="µm"')
    out.append(f'<Pixels ID="Pixels:0" DimensionOrder="XYCZT" Type="{_PIXEL_TYPES[np.dtype(dtype).name]}" '
               f'SizeX="{n_x}" SizeY="{n_y}" SizeZ="1" SizeC="{n_c}" SizeT="1"{sizes}>')
    out.extend(f'<Channel ID="Channel:0:{i}" Name={_attr(str(label))} SamplesPerPixel="1" '
               f'Color="{_rgba(COLOURS[i % len(COLOURS)])}"/>' for i, label in enumerate(labels))
    out.extend(f'<TiffData IFD="{i}" FirstZ="0" FirstT="0" FirstC="{i}" PlaneCount="1"/>'
               for i in range(n_c))
    out.append('</Pixels><AnnotationRef ID="Annotation:0"/>')
    if provenance:
        out.append('<AnnotationRef ID="Annotation:1"/>')
    out.append('</Image><StructuredAnnotations>')
    out.append(_map_annotation("Annotation:0", CHANNEL_TAGS,
                               [(f"Channel:0:{i}", str(c)) for i, c in enumerate(channels)]))
    if provenance:
        out.append(_map_annotation("Annotation:1", PROVENANCE,
                                   [(str(k), str(v)) for k, v in provenance.items()]))
    out.append("</StructuredAnnotations></OME>")
    return "".join(out).encode("ascii", "xmlcharrefreplace").decode("ascii")


def _attr(value: str) -> str:
    from xml.sax.saxutils import quoteattr

    return quoteattr(value)


def _map_annotation(id_: str, namespace: str, pairs) -> str:
    from xml.sax.saxutils import escape

    items = "".join(f"<M K={_attr(k)}>{escape(v)}</M>" for k, v in pairs)
    return f'<MapAnnotation ID="{id_}" Namespace={_attr(namespace)}><Value>{items}</Value></MapAnnotation>'


#: Elements of the source's first image that are carried, in schema order.
_CARRIED_IMAGE_PARTS = ("AcquisitionDate", "Description", "InstrumentRef", "ObjectiveSettings")


def _acquisition_elements(source_xml: str | None):
    """The source's instruments and first image's acquisition elements as XML text.

    ``([instrument, ...], [image part, ...])``, empty lists without a source (or one that
    does not parse: nothing is carried), None when the source is in another schema version
    or uses other namespaces inside what is carried (then the model decides).
    """
    import xml.etree.ElementTree as ET

    if not source_xml:
        return [], []
    try:
        root = ET.fromstring(source_xml)
    except ET.ParseError:
        return [], []
    prefix = "{" + OME_NAMESPACE + "}"
    if root.tag != prefix + "OME":
        return None
    images = root.findall(prefix + "Image")
    if not images:
        return [], []
    instruments = root.findall(prefix + "Instrument")
    for instrument in instruments:
        for parent in list(instrument.iter()):
            for child in list(parent):
                if child.tag == prefix + "AnnotationRef":
                    parent.remove(child)
    first = images[0]
    known = {i.get("ID") for i in instruments}
    parts = []
    for tag in _CARRIED_IMAGE_PARTS:
        element = first.find(prefix + tag)
        if element is None:
            continue
        if tag in ("InstrumentRef", "ObjectiveSettings"):
            ref = first.find(prefix + "InstrumentRef")
            if ref is None or ref.get("ID") not in known:
                continue
        parts.append(element)
    texts = []
    for element in [*instruments, *parts]:
        for node in element.iter():
            if not node.tag.startswith(prefix) or any(k.startswith("{") for k in node.attrib):
                return None
            node.tag = node.tag[len(prefix):]
        element.tail = None
        texts.append(ET.tostring(element, encoding="unicode"))
    return texts[:len(instruments)], texts[len(instruments):]


def ome_xml_via_model(name: str, shape, dtype, channels: Sequence[str], labels: Sequence[str],
                      pixel_size=None, provenance: Mapping[str, str] | None = None,
                      source_xml: str | None = None) -> str:
    """:func:`ome_xml` built with ``ome_types``' model (sources in other schema versions)."""
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
