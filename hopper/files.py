"""Writing files and folders atomically: a reader sees the old one or the new one, never half of one."""
from __future__ import annotations

import os
import shutil
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


def publish_folder(build, final_dir, done_name: str) -> None:
    """Run build(tmp_dir) in a fresh hidden folder beside final_dir, then rename it into place.

    Readers see the whole folder or none of it; of two racing builders one wins and the
    other's copy is dropped (``done_name`` is the file that marks a finished folder).
    """
    final_dir = Path(final_dir)
    final_dir.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=".build-", dir=final_dir.parent))
    try:
        build(tmp)
        # mkdtemp (and some writers) make owner-only files; a cache is as readable as any other.
        os.chmod(tmp, 0o755)
        for f in tmp.iterdir():
            os.chmod(f, 0o644)
        try:
            os.replace(tmp, final_dir)
        except OSError:
            if not (final_dir / done_name).is_file():  # not a rival's finished copy
                raise
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
