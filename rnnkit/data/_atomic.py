"""Atomic file writes: a temp file in the same folder, then os.replace.

A reader sees the old file or the new one, never half of one; a failed write
leaves no temp file behind.
"""
from __future__ import annotations

import os
import tempfile
from pathlib import Path


def write_text(path, text: str) -> Path:
    """Write ``text`` (UTF-8) to ``path`` atomically, with the usual permissions (umask)."""
    return write_bytes(path, text.encode("utf-8"))


def write_bytes(path, data: bytes) -> Path:
    """Write ``data`` to ``path`` atomically, with the usual permissions (umask)."""
    path = Path(path)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    try:
        with os.fdopen(fd, "wb") as f:
            f.write(data)
            f.flush()
            os.fsync(f.fileno())
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp, 0o666 & ~umask)  # mkstemp makes 0600; a report or config is for sharing
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise
    return path
