"""Declaring step settings: one frozen dataclass per step, each field with its doc and range.

A step module (``steps.hot_pixels``, ``steps.speckle``, ``quality``...) declares its
settings with :func:`setting`; :func:`build_settings` is the one validation of values
against those declarations (recipe TOML and keyword arguments of the step functions
alike); :mod:`plexwash.qc.recipe` also reads the metadata to write the commented default
recipe.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np

from .errors import InputError


def setting(
    default: Any,
    doc: str,
    *,
    low: float | None = None,
    high: float | None = None,
    low_open: bool = False,
    high_open: bool = False,
    choices: tuple[str, ...] | None = None,
) -> Any:
    """A dataclass field carrying its documentation and allowed range.

    Parameters
    ----------
    default : bool, int, float or str
        The default value; its type is the setting's type.
    doc : str
        One line shown in the default recipe and in the studio.
    low, high : float, optional
        Allowed range (inclusive unless ``low_open`` / ``high_open``).
    choices : tuple of str, optional
        Allowed values of a string setting.

    Examples
    --------
    >>> import dataclasses
    >>> @dataclasses.dataclass(frozen=True)
    ... class Demo:
    ...     radius: int = setting(2, "window half-width in pixels", low=1, high=50)
    >>> dataclasses.fields(Demo)[0].metadata["doc"]
    'window half-width in pixels'
    """
    meta = {
        "doc": doc,
        "low": low,
        "high": high,
        "low_open": low_open,
        "high_open": high_open,
        "choices": choices,
    }
    return dataclasses.field(default=default, metadata=meta)


def describe_range(meta: dict) -> str:
    """Human-readable allowed range of a setting, e.g. ``'> 0 and <= 1'``.

    Examples
    --------
    >>> describe_range({"low": 0, "high": 1, "low_open": True, "high_open": False, "choices": None})
    '> 0 and <= 1'
    """
    if meta.get("choices"):
        return "one of " + ", ".join(repr(c) for c in meta["choices"])
    parts = []
    if meta.get("low") is not None:
        parts.append(("> " if meta.get("low_open") else ">= ") + f"{meta['low']:g}")
    if meta.get("high") is not None:
        parts.append(("< " if meta.get("high_open") else "<= ") + f"{meta['high']:g}")
    return " and ".join(parts) if parts else "any value"


def build_settings(cls: type, values: Mapping, *, section: str, where: str | Path | None = None):
    """Construct a settings dataclass from a mapping, validating names, types and ranges.

    Parameters
    ----------
    cls : type
        A frozen dataclass declared with :func:`setting`.
    values : mapping
        Setting name -> value; missing names keep their defaults.
    section : str
        Prefix of the setting names in errors (``"speckle"``, ``"speckle.channels.Nd145"``).
    where : str or Path, optional
        The file the values come from: errors read ``error: <where>: <section.key> ...``.
        Without it (keyword arguments of a function) they read ``error: <section.key>: ...``.

    Raises
    ------
    InputError
        An unknown name (named, with the known ones), a wrong type, a value out of range.

    Examples
    --------
    >>> @dataclasses.dataclass(frozen=True)
    ... class Demo:
    ...     radius: int = setting(2, "window half-width", low=1, high=50)
    >>> build_settings(Demo, {"radius": 3.0}, section="demo")
    Demo(radius=3)
    """
    fields = {f.name: f for f in dataclasses.fields(cls)}
    for key in values:
        if key not in fields:
            raise InputError(where or section, f"unknown key {section}.{key}; known: {', '.join(fields)}")
    checked = {key: _check_value(fields[key], value, key=f"{section}.{key}", where=where)
               for key, value in values.items()}
    return cls(**checked)


def _check_value(field: dataclasses.Field, value, *, key: str, where):
    def problem(text: str) -> InputError:
        return InputError(where, f"{key} {text}") if where is not None else InputError(key, text)

    meta = field.metadata
    kind = type(field.default)
    if kind is bool:
        if not isinstance(value, (bool, np.bool_)):
            raise problem(f"must be true or false, got {value!r}")
        return bool(value)
    if kind is str:
        if not isinstance(value, str):
            raise problem(f"must be a string, got {value!r}")
        if meta.get("choices") and value not in meta["choices"]:
            raise problem(f"= {value!r} is not allowed; allowed: {describe_range(meta)}")
        return value
    number = (int, float, np.integer, np.floating)
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, number):
        raise problem(f"must be {'a whole number' if kind is int else 'a number'}, got {value!r}")
    if kind is int:
        if not float(value).is_integer():
            raise problem(f"must be a whole number, got {value!r}")
        value = int(value)
    else:
        value = float(value)
        if not math.isfinite(value):
            raise problem(f"must be finite, got {value!r}")
    if not in_range(value, meta):
        raise problem(f"= {value!r} is out of range; allowed: {describe_range(meta)}")
    return value


def in_range(value: float, meta: Mapping) -> bool:
    """Whether ``value`` lies in a setting's declared range."""
    low, high = meta.get("low"), meta.get("high")
    if low is not None and (value < low or (meta.get("low_open") and value == low)):
        return False
    if high is not None and (value > high or (meta.get("high_open") and value == high)):
        return False
    return True
