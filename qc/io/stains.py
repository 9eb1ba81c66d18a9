"""The stain sheet (``stains.csv``: tag, marker, wash[, role]) and the small-CSV helpers other readers share."""

from __future__ import annotations

import csv
import dataclasses
import io
from collections.abc import Sequence
from pathlib import Path

from ..errors import InputError


@dataclasses.dataclass(frozen=True)
class StainSheet:
    """The stain sheet: acquisition tags, readable marker names, whether each is washed, and
    the segmentation role of each (``nuclear``, ``membrane`` or ``""``)."""

    tags: tuple[str, ...]
    markers: tuple[str, ...]
    wash: tuple[bool, ...]
    path: Path | None = None
    roles: tuple[str, ...] = ()

    def __post_init__(self):
        if not self.roles:
            object.__setattr__(self, "roles", ("",) * len(self.tags))


#: The values of the stain sheet's optional ``role`` column (empty: no role).
ROLES = ("nuclear", "membrane")


def read_stains(path: str | Path) -> StainSheet:
    """Read ``stains.csv`` (columns ``tag,marker,wash[,role]``; ``wash`` is ``yes`` or ``no``).

    The optional ``role`` column marks the channels that make the segmentation composites:
    ``nuclear``, ``membrane`` or empty. A role needs ``wash = yes`` (the composites are
    built from washed channels).

    Examples
    --------
    >>> import tempfile, pathlib
    >>> p = pathlib.Path(tempfile.mkdtemp()) / "stains.csv"
    >>> _ = p.write_text("tag,marker,wash\\nNd145,membrane,yes\\nIr191,DNA,no\\n")
    >>> read_stains(p).wash
    (True, False)
    """
    path = Path(path)
    rows = _read_csv_rows(path, required=("tag", "marker", "wash"))
    channels, labels, use, roles = [], [], [], []
    for number, row in rows:
        name = (row.get("tag") or "").strip()
        if not name:
            raise InputError(path, f"row {number}: empty tag")
        flag = (row.get("wash") or "").strip().lower()
        if flag not in ("yes", "no"):
            raise InputError(path, f"row {number}: wash must be 'yes' or 'no', got {flag!r}")
        channels.append(name)
        labels.append((row.get("marker") or "").strip() or name)
        use.append(flag == "yes")
        role = (row.get("role") or "").strip().lower()
        if role and role not in ROLES:
            raise InputError(path, f"row {number}: role must be {' or '.join(ROLES)} or empty, got {role!r}")
        if role and flag != "yes":
            raise InputError(path, f"row {number}: {name} has role {role} but wash = no "
                             "(composites are built from washed channels)")
        roles.append(role)
    refuse_duplicates(path, channels, "tag")
    return StainSheet(tuple(channels), tuple(labels), tuple(use), path, tuple(roles))


def stains_text(sheet: StainSheet) -> str:
    """A stain sheet as ``stains.csv`` text (the ``role`` column only when a role is set).

    Examples
    --------
    >>> print(stains_text(StainSheet(("Ir191", "Nd145"), ("DNA", "CD45"), (True, True),
    ...                              roles=("nuclear", "membrane"))), end="")
    tag,marker,wash,role
    Ir191,DNA,yes,nuclear
    Nd145,CD45,yes,membrane
    """
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    with_roles = any(sheet.roles)
    writer.writerow(["tag", "marker", "wash"] + (["role"] if with_roles else []))
    for tag, marker, wash, role in zip(sheet.tags, sheet.markers, sheet.wash, sheet.roles, strict=True):
        writer.writerow([tag, marker, "yes" if wash else "no"] + ([role] if with_roles else []))
    return buffer.getvalue()


def read_csv_cells(path: Path) -> list[tuple[int, list[str]]]:
    """The non-blank rows of a small CSV file as (line number, cells).

    One-line errors for a missing, unreadable or empty file; the callers check the cells.
    """
    if not path.exists():
        raise InputError(path, "file not found")
    try:
        text = path.read_text(encoding="utf-8-sig")
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(path, f"cannot read ({exc})") from None
    rows = [(line, cells) for line, cells in enumerate(csv.reader(text.splitlines()), start=1)
            if any(cell.strip() for cell in cells)]
    if not rows:
        raise InputError(path, "file is empty")
    return rows


def _read_csv_rows(path: Path, *, required: Sequence[str]) -> list[tuple[int, dict]]:
    """Rows of a small CSV as (line number, dict), checking the header names ``required``."""
    rows = read_csv_cells(path)
    header = [h.strip() for h in rows[0][1]]
    missing = [c for c in required if c not in header]
    if missing:
        raise InputError(path, f"missing column(s) {', '.join(missing)}; expected {','.join(required)}")
    body = [(line, dict(zip(header, cells, strict=False))) for line, cells in rows[1:]]
    if not body:
        raise InputError(path, "no rows below the header")
    return body


def refuse_duplicates(path, names: Sequence[str], what: str, *,
                       message: str = "duplicate {what} name(s): {names}") -> None:
    """Raise InputError naming every name that occurs more than once, in first-seen order."""
    seen, dups = set(), []
    for name in names:
        if name in seen and name not in dups:
            dups.append(name)
        seen.add(name)
    if dups:
        raise InputError(path, message.format(what=what, names=", ".join(dups)))
