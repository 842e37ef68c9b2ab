"""Vectors a load has embedded but not yet committed, kept on disk beside the store so an interrupted load resumes."""
from __future__ import annotations

import hashlib
import shutil
import tempfile
import uuid
from pathlib import Path

import numpy as np

from .files import write_atomic
from .store import DIM as _DIM

CHUNK = 4096  # texts embedded (and saved) at a time: bounds memory and the work lost to a crash


def text_key(text: str) -> str:
    """The key of a text's vector: a SHA-256 of its UTF-8 bytes (hex, first 32 digits).

    DuckDB's ``substr(sha256(text), 1, 32)`` gives the same key, so the load's write joins
    stored texts to these vectors inside the database (``tests/test_resume.py`` checks it)."""
    return hashlib.sha256(text.encode("utf-8")).hexdigest()[:32]


# The SQL form of text_key, for a VARCHAR column or expression.
def key_sql(column: str) -> str:
    return f"substr(sha256({column}), 1, 32)"


class PendingVectors:
    """A folder of ``chunk-*.parquet`` files, columns ``key`` (text_key) and ``embedding``.

    One folder per store, embedding model and precision: ``STORE.cache/pending-<model
    digest>/`` for fp32 vectors, ``pending-<model digest>-int8/`` for int8 ones.
    A load writes each embedded chunk here as soon as it is done, and keeps no vector in
    memory: its write transaction reads them back with DuckDB (``sql_source``), so a load's
    memory does not grow with the number of facts.  A re-run after an interruption embeds
    only the texts whose keys are missing.  Once the load has committed, the chunks it wrote
    or used are removed (another load's stay), and the folder when empty.  Where the folder
    cannot be written, the chunks go to a private temporary folder instead (the load works,
    it just cannot resume).
    """

    def __init__(self, store_path, model_sha256: str, precision: str = "fp32"):
        suffix = "" if precision == "fp32" else f"-{precision}"
        self.folder = Path(str(store_path) + ".cache") / f"pending-{model_sha256[:16]}{suffix}"
        self.resumable = True
        self._damaged: set[Path] = set()
        self._used: set[Path] = set()  # chunks this load wrote or took vectors from

    def _chunks(self) -> list[Path]:
        if not self.folder.is_dir():
            return []
        return [f for f in sorted(self.folder.glob("chunk-*.parquet")) if f not in self._damaged]

    def keys(self, wanted: set[str]) -> set[str]:
        """The keys in ``wanted`` that a readable chunk holds; damaged chunks are set aside."""
        import pyarrow.parquet as pq

        found: set[str] = set()
        for f in self._chunks():
            try:
                ks = pq.read_table(f, columns=["key"]).column("key").to_pylist()
                if pq.ParquetFile(f).schema_arrow.field("embedding").type.list_size != _DIM:
                    raise ValueError("not a vector chunk")
            except (OSError, ValueError, KeyError, AttributeError):
                self._damaged.add(f)  # a damaged or half-removed chunk: its texts are embedded again
                continue
            hits = [k for k in ks if k in wanted]
            if hits:
                self._used.add(f)
                found.update(hits)
        return found

    def save(self, texts: list[str], vectors: np.ndarray) -> None:
        """Keep one embedded chunk (atomically: written to a temporary name, then renamed)."""
        if not texts:
            return
        try:
            self._write(texts, vectors)
        except OSError:
            # The folder cannot be written (a read-only place): keep the chunks privately.
            self.folder = Path(tempfile.mkdtemp(prefix="hopper-vectors-"))
            self.resumable = False
            self._write(texts, vectors)

    def _write(self, texts: list[str], vectors: np.ndarray) -> None:
        import pyarrow as pa
        import pyarrow.parquet as pq

        self.folder.mkdir(parents=True, exist_ok=True)
        keys = [text_key(t) for t in texts]
        flat = np.ascontiguousarray(vectors, np.float32).reshape(-1)
        table = pa.table({"key": pa.array(keys, pa.string()),
                          "embedding": pa.FixedSizeListArray.from_arrays(pa.array(flat), _DIM)})
        buf = pa.BufferOutputStream()
        pq.write_table(table, buf, compression="none")
        # a name of its own: two loads saving chunks that begin alike must not replace each
        # other's (one may be reading it under the write lock)
        final = self.folder / f"chunk-{uuid.uuid4().hex}.parquet"
        write_atomic(final, buf.getvalue().to_pybytes())
        self._used.add(final)

    def sql_source(self, con) -> str:
        """A SQL table expression (key, embedding FLOAT[384]) over every readable chunk, one
        row per key.  Two loads of one store running at once may both have saved a text."""
        files = self._chunks()
        if not files:
            return f"(SELECT NULL::VARCHAR AS key, NULL::FLOAT[{_DIM}] AS embedding WHERE false)"
        listed = "[" + ", ".join("'" + str(f).replace("'", "''") + "'" for f in files) + "]"
        scan = f"read_parquet({listed})"
        rows, distinct = con.execute(f"SELECT count(*), count(DISTINCT key) FROM {scan}").fetchall()[0]
        if rows == distinct:
            return f"(SELECT key, embedding::FLOAT[{_DIM}] AS embedding FROM {scan})"
        return (f"(SELECT key, any_value(embedding)::FLOAT[{_DIM}] AS embedding FROM {scan} "
                "GROUP BY key)")

    def clear(self) -> None:
        """Remove the chunks this load wrote or used (committed now), and the folder when
        empty.  Chunks of another load running at the same time stay."""
        if not self.resumable:
            shutil.rmtree(self.folder, ignore_errors=True)
            return
        for f in self._used:
            try:
                f.unlink()
            except OSError:
                pass
        try:
            self.folder.rmdir()
        except OSError:
            pass  # not empty (another load's chunks), or gone

