"""Recipes: every cleaning setting, global and per channel, parsed once into frozen objects.

A recipe is a TOML file with one section per cleaning step of the registry
(:mod:`plexwash.qc.steps.registry`: ``[hot_pixels]``, ``[compensation]``,
``[speckle]``), then ``[quality]`` and ``[output]``. Each declares its own settings
dataclass (with docs and ranges, see :mod:`plexwash.qc.settings`); this module
validates TOML against those declarations (:func:`plexwash.qc.settings.build_settings`),
writes the commented default, and hashes the canonical settings for provenance.
Per-channel overrides live under ``[<section>.channels.<channel name>]`` for the
per-channel steps and ``[quality]``.
"""

from __future__ import annotations

import dataclasses
import hashlib
import tomllib
from collections.abc import Mapping, Sequence
from pathlib import Path
from types import MappingProxyType
from typing import TYPE_CHECKING

from .errors import InputError
from .settings import build_settings, describe_range
from .steps.registry import STEP_NAMES, STEPS

if TYPE_CHECKING:
    from .audit import AuditSettings
    from .composite import CompositeSettings
    from .io import OutputSettings
    from .quality import QualitySettings

#: Sections that are not cleaning steps, after the steps.
OTHER_SECTIONS = ("quality", "output", "audit", "composite")
#: Sections whose settings may be overridden channel by channel.
PER_CHANNEL = tuple(s.name for s in STEPS if s.per_channel) + ("quality", "output")
#: The only keys a section's per-channel table may set (where not every key may differ).
CHANNEL_KEYS = {"output": ("cofactor",)}
SECTION_ORDER = STEP_NAMES + OTHER_SECTIONS

_SECTION_TITLES = {
    **{s.name: s.title for s in STEPS},
    "quality": "Quality flags: thresholds for empty, low-sbr, saturated and striped.",
    "output": "Output: how washed stacks are written.",
    "audit": "Crosstalk audit: co-positivity of mutually exclusive markers, raw vs washed (audit.csv).",
    "composite": "Composites for segmentation (stain sheet roles): cohort-wide clipping and combining.",
}


def section_classes() -> dict[str, type]:
    """The settings dataclass of each recipe section: the registry's steps in order, then
    ``quality`` and ``output``."""
    from .audit import AuditSettings
    from .composite import CompositeSettings
    from .io import OutputSettings
    from .quality import QualitySettings

    return {**{s.name: s.settings for s in STEPS}, "quality": QualitySettings, "output": OutputSettings,
            "audit": AuditSettings, "composite": CompositeSettings}


@dataclasses.dataclass(frozen=True)
class Recipe:
    """A validated, immutable recipe.

    Attributes
    ----------
    steps : mapping
        Step name -> the step's global settings, for every step of the registry; each is
        also an attribute (``recipe.hot_pixels``, ``recipe.compensation``, ``recipe.speckle``).
    quality, output, audit, composite
        The global settings of those sections (``audit``: the crosstalk audit's exclusive
        pairs and test; ``composite``: the segmentation composites).
    overrides : mapping
        ``{section: {channel: settings}}``: complete per-channel settings (global values
        with the channel's overrides applied) for channels that have overrides.
    source : Path or None
        The file the recipe was read from (relative paths in it resolve against its folder).
    batch_spillover : mapping
        ``[compensation.batches]``: batch (as the sample sheet names it) -> spillover matrix
        CSV for that batch's ROIs, as written (relative to the recipe); batches not listed
        use ``[compensation] spillover``.
    """

    steps: Mapping[str, object]
    quality: QualitySettings
    output: OutputSettings
    overrides: Mapping[str, Mapping[str, object]] = dataclasses.field(default_factory=dict)
    source: Path | None = None
    audit: AuditSettings | None = None
    composite: CompositeSettings | None = None
    batch_spillover: Mapping[str, str] = dataclasses.field(default_factory=dict)

    def __post_init__(self):
        classes = section_classes()
        for name in ("audit", "composite"):
            if getattr(self, name) is None:
                object.__setattr__(self, name, classes[name]())

    def __getattr__(self, name: str):
        steps = self.__dict__.get("steps")
        if steps is not None and name in steps:
            return steps[name]
        raise AttributeError(f"{type(self).__name__!r} object has no attribute {name!r}")

    def __reduce__(self):  # mapping proxies do not pickle: rebuild from plain dicts
        overrides = {section: dict(table) for section, table in self.overrides.items()}
        return _rebuild, (dict(self.steps), self.quality, self.output, overrides, self.source,
                          self.audit, self.composite, dict(self.batch_spillover))

    def _with_section(self, section: str, settings, **changes) -> Recipe:
        if section in OTHER_SECTIONS:
            return dataclasses.replace(self, **{section: settings}, **changes)
        steps = MappingProxyType({**self.steps, section: settings})
        return dataclasses.replace(self, steps=steps, **changes)

    def for_channel(self, section: str, channel: str):
        """Settings of ``section`` that apply to one channel."""
        return self.overrides.get(section, {}).get(channel, getattr(self, section))

    def for_channels(self, section: str, channels: Sequence[str]) -> list:
        """Settings of ``section`` for each channel, in order."""
        return [self.for_channel(section, c) for c in channels]

    def check_channels(self, channels: Sequence[str], *, roi: str | Path) -> None:
        """Refuse overrides that name channels the ROI does not have (likely typos)."""
        for section, table in self.overrides.items():
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

    def batch_spillover_paths(self) -> dict[str, Path]:
        """``[compensation.batches]`` resolved against the recipe: batch -> matrix CSV."""
        out = {}
        for batch, name in self.batch_spillover.items():
            path = Path(name)
            out[batch] = path if path.is_absolute() or self.source is None else self.source.parent / path
        return out

    def with_batch_spillover(self, table: Mapping[str, str]) -> Recipe:
        """A copy whose ``[compensation.batches]`` is ``table`` (batch -> CSV name)."""
        return dataclasses.replace(self, batch_spillover=_batch_table(table, where=self.source or "recipe"))

    def to_dict(self) -> dict:
        """Plain nested dict of every setting (the canonical form that is hashed)."""
        out = {s: dataclasses.asdict(getattr(self, s)) for s in SECTION_ORDER}
        for section, table in self.overrides.items():
            base = dataclasses.asdict(getattr(self, section))
            out[section]["channels"] = {
                ch: {k: v for k, v in dataclasses.asdict(obj).items() if v != base[k]}
                for ch, obj in sorted(table.items())
            }
        if self.batch_spillover:  # only when set: recipes without it keep their hash
            out["compensation"]["batches"] = dict(sorted(self.batch_spillover.items()))
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
        new = build_section(cls, current, where=self.source or "recipe", section=section)
        overrides = {s: dict(t) for s, t in self.overrides.items()}
        if section in overrides:  # overrides keep their own values on top of the new globals
            changed = self.to_dict()[section].get("channels", {})
            overrides[section] = {
                ch: build_settings(cls, {**dataclasses.asdict(new), **ov}, where="recipe", section=section)
                for ch, ov in changed.items()
            }
        return self._with_section(section, new, overrides=_freeze(overrides))

    def with_channel(self, section: str, channel: str, **changes) -> Recipe:
        """A copy with per-channel overrides of one section for one channel."""
        if section not in PER_CHANNEL:
            raise InputError("recipe", f"[{section}] has no per-channel settings")
        _check_channel_keys(section, changes, where="recipe", section=f"{section}.channels.{channel}")
        cls = section_classes()[section]
        current = dataclasses.asdict(self.for_channel(section, channel))
        current.update(changes)
        obj = build_settings(cls, current, where="recipe", section=f"{section}.channels.{channel}")
        overrides = {s: dict(t) for s, t in self.overrides.items()}
        overrides.setdefault(section, {})[channel] = obj
        return dataclasses.replace(self, overrides=_freeze(overrides))

    def to_toml(self) -> str:
        """The recipe as commented TOML text that :func:`load_recipe` reads back identically."""
        return _render(self)


def _freeze(overrides: dict) -> Mapping:
    return MappingProxyType({s: MappingProxyType(dict(t)) for s, t in overrides.items() if t})


def _recipe(sections: Mapping[str, object], **extra) -> Recipe:
    """A :class:`Recipe` from every section's settings (steps and the others)."""
    steps = MappingProxyType({name: sections[name] for name in STEP_NAMES})
    return Recipe(steps=steps, **{name: sections[name] for name in OTHER_SECTIONS}, **extra)


def _rebuild(steps: dict, quality, output, overrides: dict, source, audit=None, composite=None,
             batch_spillover=None) -> Recipe:
    return _recipe({**steps, "quality": quality, "output": output, "audit": audit, "composite": composite},
                   overrides=_freeze(overrides), source=source,
                   batch_spillover=MappingProxyType(dict(batch_spillover or {})))


def _batch_table(table, *, where) -> Mapping[str, str]:
    """Check ``[compensation.batches]``: a table of batch = "matrix.csv" (non-empty text)."""
    if not isinstance(table, Mapping):
        raise InputError(where, "compensation.batches must be a table: one line per batch, "
                         'e.g. B1 = "spillover-B1.csv"')
    out = {}
    for batch, name in table.items():
        if not isinstance(name, str) or not name.strip():
            raise InputError(where, f"compensation.batches.{_toml_key(str(batch))} must name a "
                             f"spillover matrix CSV (text), got {name!r}")
        out[str(batch)] = name.strip()
    return MappingProxyType(out)


def build_section(cls: type, values: Mapping, *, where, section: str):
    """:func:`~plexwash.qc.settings.build_settings` plus the one setting that is not a plain
    value: ``[audit] exclusive``, a list of pairs checked by
    :func:`plexwash.qc.audit.parse_exclusive`."""
    values = dict(values)
    pairs = values.pop("exclusive", None) if section == "audit" else None
    if section == "composite":  # named with its file here; the class itself says "recipe"
        low, high = values.get("low_percentile", 1.0), values.get("high_percentile", 99.5)
        if isinstance(low, (int, float)) and isinstance(high, (int, float)) and not low < high:
            raise InputError(where, f"composite.low_percentile ({low:g}) must be below "
                             f"composite.high_percentile ({high:g})")
    built = build_settings(cls, values, where=where, section=section)
    if pairs is not None:
        from .audit import parse_exclusive

        built = dataclasses.replace(built, exclusive=parse_exclusive(pairs, where=where))
    return built


def _check_channel_keys(name: str, values: Mapping, *, where, section: str) -> None:
    allowed = CHANNEL_KEYS.get(name)
    if allowed is None:
        return
    extra = [k for k in values if k not in allowed]
    if extra:
        raise InputError(where, f"unknown key {section}.{extra[0]}: per channel only "
                         f"{', '.join(allowed)} may be set")


def default_recipe() -> Recipe:
    """The recipe used when none is given."""
    return _recipe({name: cls() for name, cls in section_classes().items()})


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
    sections, all_overrides, batches = {}, {}, {}
    for name, cls in classes.items():
        table = dict(data.get(name, {}))
        if not isinstance(data.get(name, {}), Mapping):
            raise InputError(where, f"{name} must be a table [{name}]")
        overrides = table.pop("channels", None)
        if name == "compensation" and "batches" in table:
            batches = _batch_table(table.pop("batches"), where=where)
        sections[name] = build_section(cls, table, where=where, section=name)
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
            _check_channel_keys(name, values, where=where, section=f"{name}.channels.{channel}")
            per[channel] = build_settings(cls, {**base, **values}, where=where,
                                          section=f"{name}.channels.{channel}")
        all_overrides[name] = per
    return _recipe(sections, overrides=_freeze(all_overrides), source=source, batch_spillover=batches)


# --------------------------------------------------------------------------- TOML text


def _toml_value(value) -> str:
    if isinstance(value, (tuple, list)):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
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
    from ._version import __version__

    lines = [
        f"# plexwash recipe (written by plexwash {__version__}).",
        f"# Every cleaning setting of a wash. Steps run in this order: {', '.join(STEP_NAMES)}.",
        "# Per-channel overrides: add a table [<section>.channels.<channel>] with the keys to change,",
        "# e.g. [speckle.channels.Nd145] radius = 3, or enabled = false to skip a step for a channel.",
        "# A spillover matrix per batch (the sample sheet's batch column): a table [compensation.batches]",
        '# with one line per batch, e.g. B1 = "spillover-B1.csv" (relative to the recipe).',
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
        if section == "compensation" and recipe.batch_spillover:
            lines.append("# Spillover matrix per batch; batches not listed use spillover above.")
            lines.append("[compensation.batches]")
            lines.extend(f"{_toml_key(b)} = {_toml_value(n)}" for b, n in sorted(recipe.batch_spillover.items()))
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
