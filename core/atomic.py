"""Atomic file output: write beside the target, then move into place.

A crash or a full disk never leaves half a file, and never spoils a good file already there.
"""

from __future__ import annotations

import os
import tempfile
from pathlib import Path


def write_atomic(path: str | os.PathLike, data: bytes | str, *, encoding: str = "utf-8") -> None:
    """Write ``data`` to ``path`` so that readers see either the old file or the whole new one."""
    target = Path(path)
    payload = data.encode(encoding) if isinstance(data, str) else data
    fd, temp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".part", dir=target.parent)
    try:
        with os.fdopen(fd, "wb") as handle:
            handle.write(payload)
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(temp, target)
    except BaseException:
        Path(temp).unlink(missing_ok=True)
        raise
