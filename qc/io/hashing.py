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


def canonical_json(value) -> str:
    """JSON with sorted keys and no spaces: the text hashed for provenance."""
    return json.dumps(value, sort_keys=True, separators=(",", ":"), ensure_ascii=True)

