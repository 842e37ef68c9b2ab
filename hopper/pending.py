"""Vectors a load has embedded but not yet committed, kept beside the store so an interrupted load resumes."""
from __future__ import annotations

import hashlib
import os
import shutil
import tempfile
from pathlib import Path

import numpy as np

CHUNK = 4096  # texts embedded (and saved) at a time: bounds memory and the work lost to a crash


def text_key(text: str) -> str:
    """The key of a text's vector: a SHA-256 of its UTF-8 bytes (hex, first 32 digits)."""
    return hashlib.sha256(text.encode("utf-8")).hexdigest()[:32]


class PendingVectors:
    """A folder of ``chunk-*.npz`` files (keys as fixed-width text, vectors float32; no pickle).

    One folder per store, embedding model and precision: ``STORE.cache/pending-<model
    digest>/`` for fp32 vectors, ``pending-<model digest>-int8/`` for int8 ones.
    A load writes each embedded chunk here before it takes the write lock; a re-run after an
    interruption reads them back and embeds only the texts that are missing.  The folder is
    removed once the load has committed.
    """

    def __init__(self, store_path, model_sha256: str, precision: str = "fp32"):
        suffix = "" if precision == "fp32" else f"-{precision}"
        self.folder = Path(str(store_path) + ".cache") / f"pending-{model_sha256[:16]}{suffix}"

    def read(self, wanted: set[str]) -> dict[str, np.ndarray]:
        """Saved vectors of the texts in ``wanted`` (by text), from every readable chunk."""
        if not self.folder.is_dir():
            return {}
        keys = {text_key(t): t for t in wanted}
        out: dict[str, np.ndarray] = {}
        for f in sorted(self.folder.glob("chunk-*.npz")):
            try:
                with np.load(f, allow_pickle=False) as z:
                    ks, vs = z["keys"], z["vectors"]
                    if vs.ndim != 2 or len(ks) != len(vs):
                        continue
                    for i, k in enumerate(ks.tolist()):
                        t = keys.get(k)
                        if t is not None and t not in out:
                            out[t] = np.array(vs[i], np.float32)
            except (OSError, ValueError, KeyError):
                continue  # a damaged or half-removed chunk: its texts are embedded again
        return out

    def save(self, texts: list[str], vectors: np.ndarray) -> None:
        """Keep one embedded chunk (atomically: written to a temporary name, then renamed)."""
        if not texts:
            return
        try:
            self.folder.mkdir(parents=True, exist_ok=True)
            keys = np.array([text_key(t) for t in texts], dtype="<U32")
            fd, tmp = tempfile.mkstemp(prefix=".chunk-", suffix=".npz", dir=self.folder)
            with os.fdopen(fd, "wb") as fh:
                np.savez(fh, keys=keys, vectors=np.ascontiguousarray(vectors, np.float32))
            os.replace(tmp, self.folder / f"chunk-{keys[0]}-{len(keys)}.npz")
        except OSError:
            pass  # a read-only folder: the load works, it just cannot resume

    def clear(self) -> None:
        shutil.rmtree(self.folder, ignore_errors=True)
