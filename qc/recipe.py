"""Recipes: every cleaning setting, global and per channel, parsed once into frozen objects.

A recipe is a TOML file with the sections ``[hot_pixels]``, ``[compensation]``,
``[speckle]``, ``[quality]`` and ``[output]``. Each step declares its own settings
dataclass (with docs and ranges, see :mod:`plexwash.qc.settings`); this module
validates TOML against those declarations, writes the commented default, and hashes
the canonical settings for provenance. Per-channel overrides live under
``[<section>.channels.<channel name>]`` for the per-channel steps.
"""

from __future__ import annotations

import dataclasses
import hashlib
import math
import tomllib
from collections.abc import Mapping, Sequence
from pathlib import Path
from types import MappingProxyType

from .errors import InputError
from .settings import describe_range

#: Sections whose settings may be overridden channel by channel.
PER_CHANNEL = ("hot_pixels", "speckle", "quality")
SECTION_ORDER = ("hot_pixels", "compensation", "speckle", "quality", "output")

_SECTION_TITLES = {
    "hot_pixels": "Hot pixels: single-pixel spikes, detected then restored from their neighbours.",
    "compensation": "Spillover compensation: exact per-pixel NNLS with the spillover matrix.",
    "speckle": "Speckle: isolated background counts removed by a local-density test.",
    "quality": "Quality flags: thresholds for empty, low-sbr, saturated and striped.",
    "output": "Output: how washed stacks are written.",
}


def section_classes() -> dict[str, type]:
    """The settings dataclass of each recipe section, in step order."""
    from .io import OutputSettings
    from .quality import QualitySettings
    from .speckle import HotPixelSettings, SpeckleSettings
    from .spillover import CompensationSettings

    return {
        "hot_pixels": HotPixelSettings,
        "compensation": CompensationSettings,
        "speckle": SpeckleSettings,
        "quality": QualitySettings,
        "output": OutputSettings,
    }


@dataclasses.dataclass(frozen=True)
class Recipe:
    """A validated, immutable recipe.

    Attributes
    ----------
    hot_pixels, compensation, speckle, quality, output
        The global settings of each section.
    channels : mapping
        ``{section: {channel: settings}}``: complete per-channel settings (global values
        with the channel's overrides applied) for channels that have overrides.
    source : Path or None
        The file the recipe was read from (relative paths in it resolve against its folder).
    """

    hot_pixels: object
    compensation: object
    speckle: object
    quality: object
    output: object
    channels: Mapping[str, Mapping[str, object]] = dataclasses.field(default_factory=dict)
    source: Path | None = None

    def for_channel(self, section: str, channel: str):
        """Settings of ``section`` that apply to one channel."""
        return self.channels.get(section, {}).get(channel, getattr(self, section))

    def for_channels(self, section: str, channels: Sequence[str]) -> list:
        """Settings of ``section`` for each channel, in order."""
        return [self.for_channel(section, c) for c in channels]

    def check_channels(self, channels: Sequence[str], *, roi: str | Path) -> None:
        """Refuse overrides that name channels the ROI does not have (likely typos)."""
        for section, table in self.channels.items():
            unknown = [c for c in table if c not in channels]
            if unknown:
                where = self.source or "recipe"
                raise InputError(
                    where,
                    f"[{section}.channels] names channel(s) not in {Path(roi).name}: {', '.join(unknown)}",
                )

    def check_size(self, roi) -> None:
        """Refuse an ROI too small for the cleaning this recipe asks for, naming its file.

        Hot pixels compare a pixel with its 8 neighbours (at least 3 x 3 pixels); speckle
        counts neighbours in a (2 radius + 1)-pixel window that must fit in the image.
        """
        height, width = int(roi.shape[-2]), int(roi.shape[-1])
        if height < 3 or width < 3:
            raise InputError(roi.path, f"image is {height} x {width} px; cleaning needs at least 3 x 3")
        used = [c for c, u in zip(roi.channels, roi.use, strict=True) if u]
        sides = [2 * s.radius + 1 for s in self.for_channels("speckle", used)
                 if getattr(s, "enabled", True)] if getattr(self.speckle, "enabled", True) else []
        if sides and max(sides) > min(height, width):
            raise InputError(roi.path, f"image is {height} x {width} px, smaller than the speckle window "
                             f"of {max(sides)} px (speckle.radius in the recipe); lower it or turn speckle off")

    def spillover_path(self) -> Path | None:
        """The spillover CSV named by ``[compensation] spillover``, resolved against the recipe."""
        name = getattr(self.compensation, "spillover", "")
        if not name:
            return None
        path = Path(name)
        if not path.is_absolute() and self.source is not None:
            path = self.source.parent / path
        return path

    def to_dict(self) -> dict:
        """Plain nested dict of every setting (the canonical form that is hashed)."""
        out = {s: dataclasses.asdict(getattr(self, s)) for s in SECTION_ORDER}
        for section, table in self.channels.items():
            base = dataclasses.asdict(getattr(self, section))
            out[section]["channels"] = {
                ch: {k: v for k, v in dataclasses.asdict(obj).items() if v != base[k]}
                for ch, obj in sorted(table.items())
            }
        return out

    def sha256(self) -> str:
        """SHA-256 of the canonical settings (independent of comments, order and formatting).

        Examples
        --------
        >>> default_recipe().sha256() == default_recipe().sha256()
        True
        """
        from .io import canonical_json

        return hashlib.sha256(canonical_json(self.to_dict()).encode()).hexdigest()

    def replace(self, section: str, **changes) -> Recipe:
        """A copy with some global settings of one section changed (validated)."""
        cls = section_classes()[section]
        current = dataclasses.asdict(getattr(self, section))
        current.update(changes)
        new = _build(cls, current, where=self.source or "recipe", section=section)
        channels = {s: dict(t) for s, t in self.channels.items()}
        if section in channels:  # overrides keep their own values on top of the new globals
            overrides = self.to_dict()[section].get("channels", {})
            channels[section] = {
                ch: _build(cls, {**dataclasses.asdict(new), **ov}, where="recipe", section=section)
                for ch, ov in overrides.items()
            }
        return dataclasses.replace(self, **{section: new}, channels=_freeze(channels))

    def with_channel(self, section: str, channel: str, **changes) -> Recipe:
        """A copy with per-channel overrides of one section for one channel."""
        if section not in PER_CHANNEL:
            raise InputError("recipe", f"[{section}] has no per-channel settings")
        cls = section_classes()[section]
        current = dataclasses.asdict(self.for_channel(section, channel))
        current.update(changes)
        obj = _build(cls, current, where="recipe", section=f"{section}.channels.{channel}")
        channels = {s: dict(t) for s, t in self.channels.items()}
        channels.setdefault(section, {})[channel] = obj
        return dataclasses.replace(self, channels=_freeze(channels))

    def to_toml(self) -> str:
        """The recipe as commented TOML text that :func:`load_recipe` reads back identically."""
        return _render(self)


def _freeze(channels: dict) -> Mapping:
    return MappingProxyType({s: MappingProxyType(dict(t)) for s, t in channels.items() if t})


def default_recipe() -> Recipe:
    """The recipe used when none is given."""
    classes = section_classes()
    return Recipe(**{name: cls() for name, cls in classes.items()})


def load_recipe(path: str | Path | None) -> Recipe:
    """Read and validate a recipe TOML file (``None`` gives the defaults).

    Raises
    ------
    InputError
        Missing or malformed file, an unknown key (named), a wrong type or an
        out-of-range value (named with its allowed range).
    """
    if path is None:
        return default_recipe()
    path = Path(path)
    if not path.is_file():
        raise InputError(path, "recipe file not found")
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except tomllib.TOMLDecodeError as exc:
        raise InputError(path, f"malformed TOML: {exc}") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(path, f"cannot read ({exc.__class__.__name__})") from None
    return recipe_from_dict(data, source=path)


def recipe_from_dict(data: Mapping, *, source: Path | None = None) -> Recipe:
    """Validate a nested dict (as parsed from TOML) into a :class:`Recipe`."""
    where = source or "recipe"
    classes = section_classes()
    unknown = [k for k in data if k not in classes]
    if unknown:
        raise InputError(where, f"unknown recipe section [{unknown[0]}]; known: {', '.join(classes)}")
    sections, channels = {}, {}
    for name, cls in classes.items():
        table = dict(data.get(name, {}))
        if not isinstance(data.get(name, {}), Mapping):
            raise InputError(where, f"{name} must be a table [{name}]")
        overrides = table.pop("channels", None)
        sections[name] = _build(cls, table, where=where, section=name)
        if overrides is None:
            continue
        if name not in PER_CHANNEL:
            raise InputError(where, f"unknown key {name}.channels: [{name}] has no per-channel settings")
        if not isinstance(overrides, Mapping):
            raise InputError(where, f"{name}.channels must hold one table per channel")
        base = dataclasses.asdict(sections[name])
        per = {}
        for channel, values in overrides.items():
            if not isinstance(values, Mapping):
                raise InputError(where, f"{name}.channels.{channel} must be a table")
            per[channel] = _build(cls, {**base, **values}, where=where, section=f"{name}.channels.{channel}")
        channels[name] = per
    return Recipe(**sections, channels=_freeze(channels), source=source)


def _build(cls: type, values: Mapping, *, where, section: str):
    """Construct one settings dataclass from a mapping, validating names, types and ranges."""
    fields = {f.name: f for f in dataclasses.fields(cls)}
    for key in values:
        if key not in fields:
            raise InputError(where, f"unknown key {section}.{key}; known: {', '.join(fields)}")
    checked = {}
    for key, value in values.items():
        checked[key] = _check_value(fields[key], value, where=where, key=f"{section}.{key}")
    return cls(**checked)


def _check_value(field: dataclasses.Field, value, *, where, key: str):
    default = field.default
    meta = field.metadata
    kind = type(default)
    if kind is bool:
        if not isinstance(value, bool):
            raise InputError(where, f"{key} must be true or false, got {value!r}")
        return value
    if kind is str:
        if not isinstance(value, str):
            raise InputError(where, f"{key} must be a string, got {value!r}")
        if meta.get("choices") and value not in meta["choices"]:
            raise InputError(where, f"{key} = {value!r} is not allowed; allowed: {describe_range(meta)}")
        return value
    if kind is int:
        if isinstance(value, bool) or not isinstance(value, int):
            if isinstance(value, float) and value.is_integer():
                value = int(value)
            else:
                raise InputError(where, f"{key} must be a whole number, got {value!r}")
    elif kind is float:
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise InputError(where, f"{key} must be a number, got {value!r}")
        value = float(value)
        if not math.isfinite(value):
            raise InputError(where, f"{key} must be finite, got {value!r}")
    if not _in_range(value, meta):
        raise InputError(where, f"{key} = {value!r} is out of range; allowed: {describe_range(meta)}")
    return value


def _in_range(value, meta) -> bool:
    low, high = meta.get("low"), meta.get("high")
    if low is not None and (value < low or (meta.get("low_open") and value == low)):
        return False
    if high is not None and (value > high or (meta.get("high_open") and value == high)):
        return False
    return True


# --------------------------------------------------------------------------- TOML text


def _toml_value(value) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        text = repr(value)
        return text if any(c in text for c in ".en") else text + ".0"
    escaped = str(value).replace("\\", "\\\\").replace('"', '\\"')
    return f'"{escaped}"'


def _toml_key(name: str) -> str:
    bare = name.replace("_", "").replace("-", "").isalnum() and name.isascii()
    return name if bare else _toml_value(name)


def _render(recipe: Recipe) -> str:
    from . import __version__

    lines = [
        f"# plexwash recipe (written by plexwash {__version__}).",
        "# Every cleaning setting of a wash. Steps run in this order: hot_pixels, compensation, speckle.",
        "# Per-channel overrides: add a table [<section>.channels.<channel>] with the keys to change,",
        "# e.g. [speckle.channels.Nd145] radius = 3, or enabled = false to skip a step for a channel.",
        "",
    ]
    as_dict = recipe.to_dict()
    for section in SECTION_ORDER:
        obj = getattr(recipe, section)
        lines.append(f"# {_SECTION_TITLES[section]}")
        lines.append(f"[{section}]")
        for field in dataclasses.fields(obj):
            meta = field.metadata
            lines.append(f"# {meta.get('doc', '')} (allowed: {describe_range(meta)}; default {_toml_value(field.default)})")
            lines.append(f"{field.name} = {_toml_value(getattr(obj, field.name))}")
        lines.append("")
        for channel, changes in as_dict[section].get("channels", {}).items():
            lines.append(f"[{section}.channels.{_toml_key(channel)}]")
            lines.extend(f"{k} = {_toml_value(v)}" for k, v in changes.items())
            lines.append("")
    return "\n".join(lines).rstrip() + "\n"


def write_recipe(path: str | Path, recipe: Recipe | None = None) -> Path:
    """Write a recipe (the commented default when ``recipe`` is None), atomically."""
    from .files import write_atomic

    recipe = recipe or default_recipe()
    path = Path(path)
    write_atomic(path, recipe.to_toml())
    return path
