"""Content-addressed storage of uploaded files under the home folder.

A file is known by the SHA-256 of its bytes and lives at
``HOME/files/<sha[:2]>/<sha>``. User file names are display text only and never
become part of a path. Writes go to a temporary file in the same folder and are
moved into place with ``os.replace`` (atomic on POSIX), so a crash never leaves a
half-written file under its final name.
"""

from __future__ import annotations

import hashlib
import os
import re
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path

FILES_FOLDER = "files"
_SHA256 = re.compile(r"^[0-9a-f]{64}$")


@dataclass(frozen=True)
class StoredFile:
    sha256: str
    stored_path: str  # relative to the home folder, POSIX separators
    size_bytes: int


def sha256_of(raw: bytes) -> str:
    return hashlib.sha256(raw).hexdigest()


def relative_path(sha256: str) -> str:
    """``files/ab/ab...`` for a SHA-256 hex digest; refuses anything else."""
    if not _SHA256.match(sha256):
        raise ValueError(f"not a SHA-256 hex digest: {sha256!r}")
    return f"{FILES_FOLDER}/{sha256[:2]}/{sha256}"


def absolute_path(home: str | os.PathLike, stored_path: str) -> Path:
    """The absolute path of a stored file; the relative path must be one we made."""
    parts = stored_path.split("/")
    if len(parts) != 3 or parts[0] != FILES_FOLDER or relative_path(parts[2]) != stored_path:
        raise ValueError(f"not a content-addressed path: {stored_path!r}")
    return Path(home) / FILES_FOLDER / parts[1] / parts[2]


def store_bytes(home: str | os.PathLike, raw: bytes) -> StoredFile:
    """Write ``raw`` content-addressed under ``home`` (idempotent) and describe it."""
    digest = sha256_of(raw)
    rel = relative_path(digest)
    target = absolute_path(home, rel)
    if not target.exists():
        target.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(dir=target.parent, prefix=".upload-")
        try:
            with os.fdopen(fd, "wb") as handle:
                handle.write(raw)
                handle.flush()
                os.fsync(handle.fileno())
            os.replace(tmp, target)
        except BaseException:
            Path(tmp).unlink(missing_ok=True)
            raise
    return StoredFile(sha256=digest, stored_path=rel, size_bytes=len(raw))


def read_bytes(home: str | os.PathLike, stored_path: str) -> bytes:
    return absolute_path(home, stored_path).read_bytes()


def remove_unrecorded(home: str | os.PathLike, recorded: set[str], min_age_seconds: float = 3600.0) -> list[str]:
    """Delete stored files (and temp files) whose SHA-256 is not in ``recorded``.

    Only a process killed between writing a file and committing its row leaves
    such a file; it is complete but unlisted. ``min_age_seconds`` spares
    uploads in progress right now. Returns the names removed.
    """
    root = Path(home) / FILES_FOLDER
    if not root.is_dir():
        return []
    now = time.time()
    removed = []
    for path in sorted(root.glob("*/*")):
        if not path.is_file() or now - path.stat().st_mtime < min_age_seconds:
            continue
        if path.name.startswith(".") or path.name not in recorded:
            path.unlink(missing_ok=True)
            removed.append(path.name)
    return removed
