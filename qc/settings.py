"""Declaring step settings: one frozen dataclass per step, each field with its doc and range.

A step module (``speckle``, ``spillover``, ``quality``...) declares its settings with
:func:`setting`; :mod:`plexwash.qc.recipe` reads the metadata to validate TOML values,
to write the commented default recipe and to name allowed ranges in errors.
"""

from __future__ import annotations

import dataclasses
from typing import Any


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
