"""Hashes for provenance: SHA-256 of a file or folder, and the canonical JSON text that is hashed."""

from __future__ import annotations

import hashlib
import json
from pathlib import Path


def sha256_path(path: str | Path, *, chunk: int = 2**20) -> str:
    """SHA-256 of a file, or of a folder (sorted relative paths and file contents).

    Examples
    --------
    >>> import tempfile, pathlib, hashlib
    >>> p = pathlib.Path(tempfile.mkdtemp()) / "a.txt"
    >>> _ = p.write_bytes(b"abc")
    >>> sha256_path(p) == hashlib.sha256(b"abc").hexdigest()
    True
    """
    path = Path(path)
    digest = hashlib.sha256()
    if path.is_dir():
        for item in sorted(p for p in path.rglob("*") if p.is_file()):
            digest.update(item.relative_to(path).as_posix().encode() + b"\0")
            _hash_file_into(digest, item, chunk)
        return digest.hexdigest()
    _hash_file_into(digest, path, chunk)
    return digest.hexdigest()


def _hash_file_into(digest, path: Path, chunk: int) -> None:
    with open(path, "rb") as fh:
        while block := fh.read(chunk):
            digest.update(block)


def file_stamp(path: str | Path) -> dict:
    """Size and modification time of a file, or of a folder's files: what a resume compares.

    ``{"size": bytes, "mtime_ns": latest modification, "files": count}``; for a folder
    (an OME-Zarr output) the sizes are summed and the latest time of its files is kept.
    Cheap (``stat`` only): a change that keeps the size and the time is not seen here,
    only by re-hashing (``plexwash run --verify``).

    Examples
    --------
    >>> import tempfile, pathlib
    >>> p = pathlib.Path(tempfile.mkdtemp()) / "a.txt"
    >>> _ = p.write_bytes(b"abc")
    >>> file_stamp(p)["size"], file_stamp(p)["files"]
    (3, 1)
    """
    path = Path(path)
    if path.is_dir():
        size = count = latest = 0
        for item in path.rglob("*"):
            if item.is_file():
                st = item.stat()
                size, count, latest = size + st.st_size, count + 1, max(latest, st.st_mtime_ns)
        return {"size": size, "mtime_ns": latest, "files": count}
    st = path.stat()
    return {"size": st.st_size, "mtime_ns": st.st_mtime_ns, "files": 1}


def canonical_json(value) -> str:
    """JSON with sorted keys and no spaces: the text hashed for provenance."""
    return json.dumps(value, sort_keys=True, separators=(",", ":"), ensure_ascii=True)

