"""Writing files atomically: a reader sees the old file or the new one, never half of one."""
from __future__ import annotations

import os
import tempfile
from pathlib import Path


def write_atomic(path, data: bytes, mode: int = 0o644) -> None:
    """Write ``data`` to a temporary file beside ``path``, then rename it over ``path``."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix="." + path.name + ".", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())  # the bytes are on disk before the name points at them
        os.chmod(tmp, mode)
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise
