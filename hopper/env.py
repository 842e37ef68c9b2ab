"""The environment: the fact graph in memory, entity linking, and what can be fetched next."""
from __future__ import annotations

import json
import os
import re
import shutil
import tempfile
import unicodedata
from collections.abc import Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np

from .index import IVFIndex, exact_search_many, mapped, min_facts
from .store import Store

_CACHE_LAYOUT = "l2"  # bump when the cache's files change, so old snapshots are not read
ADJ_CAP = 32        # touching facts offered per hop (a hub with thousands stays cheap)
DENSE_K = 3         # facts offered at the first hop by dense similarity, to recover a poor link
LINK_MIN_SIM = 0.60  # dense entity-link fallback: below this cosine the question names nothing we know
N_CHEAP = 10        # cheap features per candidate (see candidates())
N_STOP = 6          # cheap features of the STOP action

_TOKEN = re.compile(r"[^\s]+")
_TRIM = "\"'`.,;:!?()[]{}<>«»“”‘’"


def name_key(text: str) -> str:
    """How entity names are matched: case-folded, inner white space collapsed."""
    return " ".join(unicodedata.normalize("NFC", text).casefold().split())


def _tokens(text: str) -> list[str]:
    out = []
    for tok in _TOKEN.findall(unicodedata.normalize("NFC", text).casefold()):
        tok = tok.strip(_TRIM)
        for suffix in ("'s", "’s"):
            if tok.endswith(suffix) and len(tok) > len(suffix):
                out.append(tok)  # keep the token as written too (names may end in 's)
                tok = tok[: -len(suffix)]
        if tok:
            out.append(tok)
    return out


class StringTable(Sequence):
    """A read-only list of strings kept as one UTF-8 byte array and offsets (two ``.npy``
    files, memory-mapped): a fresh process reads no per-name Python objects up front."""

    def __init__(self, blob: np.ndarray, ptr: np.ndarray):
        self.blob, self.ptr = blob, ptr

    @classmethod
    def pack(cls, strings) -> "StringTable":
        data = [s.encode("utf-8") for s in strings]
        ptr = np.zeros(len(data) + 1, np.int64)
        ptr[1:] = np.cumsum([len(d) for d in data]) if data else []
        return cls(np.frombuffer(b"".join(data), np.uint8), ptr)

    def __len__(self) -> int:
        return len(self.ptr) - 1

    def __getitem__(self, i):
        if isinstance(i, slice):
            return [self[j] for j in range(*i.indices(len(self)))]
        i = int(i)
        if i < 0:
            i += len(self)
        if not 0 <= i < len(self):
            raise IndexError(i)
        return bytes(self.blob[self.ptr[i]:self.ptr[i + 1]]).decode("utf-8")


class _SortedKeys:
    """Name key -> first entity with it, by binary search over keys sorted at cache time."""

    def __init__(self, keys: StringTable, rows: np.ndarray):
        self.keys, self.rows = keys, rows

    def get(self, key: str):
        # UTF-8 bytes sort as their code points do, so the keys (sorted as str) are searched
        # as bytes without decoding any of them.
        k = key.encode("utf-8")
        blob, ptr = self.keys.blob, self.keys.ptr
        lo, hi = 0, len(ptr) - 1
        while lo < hi:
            mid = (lo + hi) // 2
            if bytes(blob[ptr[mid]:ptr[mid + 1]]) < k:
                lo = mid + 1
            else:
                hi = mid
        if lo < len(ptr) - 1 and bytes(blob[ptr[lo]:ptr[lo + 1]]) == k:
            return int(self.rows[lo])
        return None


class Graph:
    """The store's facts as arrays: the one view training, search and the baselines share.

    Built from the DuckDB store and cached beside it as ``.npy`` files (memory-mapped, no
    pickle), keyed by the store's ``facts_version`` so a fresh ``ask`` does not re-read
    every vector from the database.
    """

    def __init__(self, arrays: dict, entity_names: list[str], relation_names: list[str],
                 facts_version: int):
        self.fact_ids = arrays["fact_ids"]
        self.subj = arrays["subj"]
        self.rel = arrays["rel"]
        self.obj = arrays["obj"]
        self.fact_vecs = arrays["fact_vecs"]
        self.entity_vecs = arrays["entity_vecs"]
        self.relation_vecs = arrays["relation_vecs"]
        self.adj_ptr = arrays["adj_ptr"]
        self.adj_fact = arrays["adj_fact"]
        self.adj_dir = arrays["adj_dir"]
        self.entity_names = entity_names
        self.relation_names = relation_names
        self.facts_version = facts_version
        self._name_index = None
        self._max_name_tokens = 1
        self._fact_row = None
        self.ivf: IVFIndex | None = None  # the dense search's index; None = exact scan

    # -- building ------------------------------------------------------------------------
    @classmethod
    def from_store(cls, store: Store, use_cache: bool = True, build_index: bool = False,
                   also=None) -> "Graph":
        """The store's graph, from the cache beside it when current.

        ``build_index``: also fit the dense search's IVF index when the store is large enough
        and none is cached (imports scikit-learn; load and train ask for it, ``ask`` never
        does and falls back to the exact scan when no index exists).  ``also(con)``, when
        given, runs on the same read connection (the caller reads more in the same open).
        """
        graph = None
        with store.connect() as con:
            version = int(Store.get_meta(con, "facts_version", "0"))
            if also is not None:
                also(con)
            cache = Path(str(store.path) + ".cache") / f"graph-v{version}-{_CACHE_LAYOUT}"
            if use_cache and (cache / "done").exists():
                try:
                    graph = cls._read_cache(cache, version)
                except (OSError, ValueError):
                    graph = None  # a damaged cache is rebuilt below
            if graph is None:
                # DuckDB keeps the blocks it reads cached (up to 80% of RAM by default): the
                # vectors would sit in memory twice, in its cache and in our arrays.
                con.execute("SET memory_limit = '512MB'")
                graph = cls._read_store(con, version)
                if use_cache:
                    graph._write_cache(cache)
                    if (cache / "done").exists():
                        # Continue on the memory-mapped cache, as every later process does:
                        # the read arrays (2.2 GB at a million facts) are let go before the
                        # IVF index makes its own copy of the fact vectors.
                        try:
                            graph = cls._read_cache(cache, version)
                        except (OSError, ValueError):
                            pass
        if build_index and graph.ivf is None and graph.n_facts >= min_facts():
            graph.ivf = IVFIndex.build(np.asarray(graph.fact_vecs))
            if use_cache and (cache / "done").exists():
                try:
                    graph.ivf.save(cache / "ivf")
                except OSError:
                    pass  # a read-only folder: this process keeps its index in memory
        return graph

    @classmethod
    def _read_store(cls, con, version: int) -> "Graph":
        import duckdb  # noqa: F401 - the relation API (con.sql), which store.py does not load

        def vectors(table: str, id_col: str, ids: np.ndarray) -> np.ndarray:
            """The vectors of ``table`` in the order of ``ids``, read in slices of 65,536 rows
            straight into one array: no sort of the vectors inside DuckDB, no join, and no
            second copy of them (a million facts' vectors are 1.5 GB)."""
            out = np.zeros((len(ids), 384), np.float32)
            seen = 0
            reader = con.sql(f"SELECT {id_col}, embedding FROM {table}").to_arrow_reader(65536)
            for batch in reader:
                pos = np.searchsorted(ids, batch.column(0).to_numpy())
                flat = batch.column(1).flatten().to_numpy(zero_copy_only=False)
                out[pos] = flat.reshape(batch.num_rows, -1)
                seen += batch.num_rows
            if seen != len(ids):
                raise ValueError(f"{table}: {seen} vectors for {len(ids)} rows")
            return out

        ents = con.sql("SELECT entity_id, name FROM entities ORDER BY entity_id").to_arrow_table()
        rels = con.sql("SELECT relation_id, name FROM relations ORDER BY relation_id").to_arrow_table()
        facts = con.sql("SELECT fact_id, subject_id, relation_id, object_id FROM facts "
                        "ORDER BY fact_id").to_arrow_table()
        entity_vecs = vectors("entities", "entity_id", ents.column("entity_id").to_numpy())
        relation_vecs = vectors("relations", "relation_id", rels.column("relation_id").to_numpy())
        fact_vecs = vectors("fact_vectors", "fact_id", facts.column("fact_id").to_numpy())
        ent_ids = ents.column("entity_id").to_numpy()
        rel_ids = rels.column("relation_id").to_numpy()
        ent_pos = np.full(int(ent_ids.max(initial=0)) + 1, -1, np.int64)
        ent_pos[ent_ids] = np.arange(len(ent_ids))
        rel_pos = np.full(int(rel_ids.max(initial=0)) + 1, -1, np.int64)
        rel_pos[rel_ids] = np.arange(len(rel_ids))
        subj = ent_pos[facts.column("subject_id").to_numpy()].astype(np.int32)
        obj = ent_pos[facts.column("object_id").to_numpy()].astype(np.int32)
        rel = rel_pos[facts.column("relation_id").to_numpy()].astype(np.int32)
        n_ent = len(ent_ids)
        # Adjacency in CSR form: every fact appears under its subject (dir 0, forward) and
        # under its object (dir 1, inverse).  A hop costs O(degree), never a scan.
        ends = np.concatenate([subj, obj]).astype(np.int64)
        fidx = np.concatenate([np.arange(len(subj)), np.arange(len(obj))]).astype(np.int32)
        dirs = np.concatenate([np.zeros(len(subj), np.int8), np.ones(len(obj), np.int8)])
        order = np.argsort(ends, kind="stable")
        adj_ptr = np.zeros(n_ent + 1, np.int64)
        np.add.at(adj_ptr, ends + 1, 1)
        arrays = {
            "fact_ids": facts.column("fact_id").to_numpy().astype(np.int64),
            "subj": subj, "rel": rel, "obj": obj, "fact_vecs": fact_vecs,
            "entity_vecs": entity_vecs, "relation_vecs": relation_vecs,
            "adj_ptr": np.cumsum(adj_ptr), "adj_fact": fidx[order], "adj_dir": dirs[order],
        }
        return cls(arrays, ents.column("name").to_pylist(), rels.column("name").to_pylist(), version)

    _ARRAYS = ("fact_ids", "subj", "rel", "obj", "fact_vecs", "entity_vecs", "relation_vecs",
               "adj_ptr", "adj_fact", "adj_dir")

    def _write_cache(self, cache: Path) -> None:
        try:
            cache.parent.mkdir(parents=True, exist_ok=True)
            tmp = Path(tempfile.mkdtemp(prefix=".tmp-", dir=cache.parent))
            for name in self._ARRAYS:
                np.save(tmp / f"{name}.npy", getattr(self, name), allow_pickle=False)
            keys = [name_key(n) for n in self.entity_names]
            order = sorted(range(len(keys)), key=lambda i: (keys[i], i))  # first entity first
            longest = max([len(_tokens(n)) for n in self.entity_names] + [1])
            tables = {"names": StringTable.pack(self.entity_names),
                      "keys": StringTable.pack([keys[i] for i in order])}
            for tname, table in tables.items():
                np.save(tmp / f"{tname}_blob.npy", table.blob, allow_pickle=False)
                np.save(tmp / f"{tname}_ptr.npy", table.ptr, allow_pickle=False)
            np.save(tmp / "keys_rows.npy", np.array(order, np.int64), allow_pickle=False)
            (tmp / "names.json").write_text(json.dumps(
                {"relations": list(self.relation_names), "max_name_tokens": min(longest, 12)}),
                "utf-8")
            (tmp / "done").write_text("ok")
            try:
                os.replace(tmp, cache)
            except OSError:  # another process wrote it first
                shutil.rmtree(tmp, ignore_errors=True)
            for old in cache.parent.glob("graph-v*"):  # keep only the current snapshot
                if old != cache:
                    shutil.rmtree(old, ignore_errors=True)
        except OSError:
            pass  # a read-only folder: work without the cache

    @classmethod
    def _read_cache(cls, cache: Path, version: int) -> "Graph":
        arrays = {n: mapped(cache / f"{n}.npy") for n in cls._ARRAYS}
        names = json.loads((cache / "names.json").read_text("utf-8"))

        def table(tname):
            return StringTable(mapped(cache / f"{tname}_blob.npy"), mapped(cache / f"{tname}_ptr.npy"))

        entity_names = table("names")
        graph = cls(arrays, entity_names, names["relations"], version)
        if len(entity_names) != len(graph.adj_ptr) - 1:
            raise ValueError("the cached names do not match the cached graph")
        graph._name_index = _SortedKeys(table("keys"), mapped(cache / "keys_rows.npy"))
        graph._max_name_tokens = int(names["max_name_tokens"])
        graph.ivf = IVFIndex.read(cache / "ivf")
        if graph.ivf is not None and len(graph.ivf.list_rows) != graph.n_facts:
            graph.ivf = None  # not this snapshot's index
        return graph

    def in_memory(self) -> "Graph":
        """Copy memory-mapped arrays into RAM (training reads them many thousand times)."""
        for name in self._ARRAYS:
            setattr(self, name, np.array(getattr(self, name)))
        if self.ivf is not None:
            for name in ("centroids", "list_ptr", "list_rows", "list_vecs"):
                setattr(self.ivf, name, np.array(getattr(self.ivf, name)))
        return self

    # -- lookups -------------------------------------------------------------------------
    @property
    def n_facts(self) -> int:
        return len(self.fact_ids)

    def entity_index(self, name: str) -> int | None:
        self._ensure_names()
        return self._name_index.get(name_key(name))

    def _ensure_names(self):
        if self._name_index is None:  # (a graph read from the cache has a sorted key table)
            index = {}
            longest = 1
            for i, n in enumerate(self.entity_names):
                index.setdefault(name_key(n), i)
                longest = max(longest, len(_tokens(n)))
            self._name_index = index
            self._max_name_tokens = min(longest, 12)

    def fact_row(self, fact_id: int) -> int | None:
        if self._fact_row is None:
            self._fact_row = {int(f): i for i, f in enumerate(self.fact_ids)}
        return self._fact_row.get(int(fact_id))

    def link(self, question: str, qvec: np.ndarray | None = None) -> list[int]:
        """Entities named in the question, longest names first; dense fallback on the names."""
        self._ensure_names()
        toks = _tokens(question)
        found: list[tuple[int, int, int]] = []  # (-length, start, entity)
        for n in range(min(self._max_name_tokens, len(toks)), 0, -1):
            for i in range(len(toks) - n + 1):
                key = " ".join(toks[i:i + n])
                ent = self._name_index.get(key)
                if ent is not None:
                    found.append((-n, i, ent))
        chosen, covered = [], set()
        for neg, start, ent in sorted(found):
            span = set(range(start, start - neg))
            if span & covered or ent in chosen:
                continue
            covered |= span
            chosen.append(ent)
        if chosen or qvec is None or len(self.entity_vecs) == 0:
            return chosen
        sims = np.asarray(self.entity_vecs) @ qvec
        best = int(np.argmax(sims))
        return [best] if sims[best] >= LINK_MIN_SIM else []

    def neighbours(self, entity: int):
        a, b = self.adj_ptr[entity], self.adj_ptr[entity + 1]
        return self.adj_fact[a:b], self.adj_dir[a:b]

    def degree(self, entity: int) -> int:
        return int(self.adj_ptr[entity + 1] - self.adj_ptr[entity])

    def far_end(self, fact: int, direction: int) -> int:
        return int(self.obj[fact] if direction == 0 else self.subj[fact])

    def dense_search(self, query: np.ndarray, k: int, exclude=()) -> np.ndarray:
        """Facts most similar to ``query``, best first: probes the IVF index when there is
        one (large stores), else an exact scan over the fact vectors."""
        return self.dense_search_many(np.asarray(query)[None, :], k, [exclude])[0]

    def dense_search_many(self, queries: np.ndarray, k: int, excludes: list) -> list:
        """``dense_search`` for many queries (one scan, or each probed list scored once)."""
        if self.n_facts == 0:
            return [np.zeros(0, np.int64) for _ in range(len(queries))]
        ks = [min(self.n_facts, k + len(ex)) for ex in excludes]
        if self.ivf is not None:
            tops = self.ivf.search_many(queries, ks)
        else:
            tops = exact_search_many(self.fact_vecs, queries, ks)
        out = []
        for top, exclude in zip(tops, excludes):
            ex = set(int(e) for e in exclude)
            out.append(np.array([t for t in top if int(t) not in ex][:k], np.int64))
        return out


def _cos(a: np.ndarray, b: np.ndarray) -> float:
    na = float(np.linalg.norm(a))
    return float(a @ b) / na if na > 1e-9 else 0.0  # b is a unit vector


@dataclass
class Walker:
    """One walk's position: where it stands and what it has fetched."""

    entity: int
    fetched: tuple = ()       # fact rows fetched so far, in order
    visited: tuple = ()       # entities stood on so far


@dataclass
class Candidates:
    """What a walker can fetch next (STOP is implicit, always offered first)."""

    facts: np.ndarray   # fact rows, int64 [C]
    dirs: np.ndarray    # 0 forward (subject -> object), 1 inverse, int8 [C]
    nexts: np.ndarray   # the entity each fetch moves to, int64 [C]
    feats: np.ndarray   # cheap features, float32 [C, N_CHEAP]
    stop_feats: np.ndarray  # float32 [N_STOP]
    here: int = -1      # the entity the walker stands on
    path: tuple = ()    # the (relation, direction) kinds fetched so far (``path_kinds``)


def path_kinds(graph: Graph, walker: Walker) -> tuple:
    """The kinds (relation * 2 + direction) of the facts a walker fetched, in order: each
    fetch's direction is read from where it led (0 when to the fact's object), which also
    holds for a fact found by similarity that did not touch where the walker stood."""
    return tuple(int(graph.rel[f]) * 2 + int(graph.obj[f] != e)
                 for f, e in zip(walker.fetched, walker.visited[1:]))


def _preranked_many(graph: Graph, ents: list, qvecs: np.ndarray, cap: int) -> list:
    """The facts touching each entity, best first for its question, capped: for many
    (entity, question vector) pairs, their neighbour lists read as one flat array, scored and
    sorted together.

    Past ``cap`` (hubs, finished one by one) the best fact of every (relation, direction)
    kind comes first, so the policy can always choose any relation, then the cap is filled
    by similarity to the question.
    """
    ents = np.asarray(ents, np.int64)
    n = len(ents)
    lo = graph.adj_ptr[ents].astype(np.int64)
    lens = (graph.adj_ptr[ents + 1] - graph.adj_ptr[ents]).astype(np.int64)
    total = int(lens.sum())
    seg = np.repeat(np.arange(n), lens)
    offs = np.cumsum(lens) - lens
    pos = np.arange(total) - offs[seg] + lo[seg]
    facts = np.asarray(graph.adj_fact[pos], np.int64)
    dirs = np.asarray(graph.adj_dir[pos], np.int8)
    sims = np.zeros(total, np.float32)
    for a in range(0, total, _ROW_CHUNK):
        b = min(total, a + _ROW_CHUNK)
        sims[a:b] = _rowdot(np.asarray(graph.fact_vecs[facts[a:b]]), qvecs[seg[a:b]])
    order = np.lexsort((np.arange(total), -sims, seg))  # per pair, best first, stable
    out = []
    for p in range(n):
        o = order[offs[p]:offs[p] + lens[p]]
        if lens[p] > cap:  # the best fact of every (relation, direction) kind first
            kind = graph.rel[facts[o]].astype(np.int64) * 2 + dirs[o]
            _, first = np.unique(kind, return_index=True)
            firsts = o[np.sort(first)][:cap]
            rest = np.setdiff1d(o, firsts, assume_unique=True)
            rest = rest[np.argsort(-sims[rest], kind="stable")]
            o = np.concatenate([firsts, rest])[:cap]
        out.append((facts[o], dirs[o]))
    return out


_ROW_CHUNK = 2048  # rows of [rows, D] blocks made at once


def _rowdot(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Row-wise inner products; each row's sum is computed alone, so a walker's features do
    not depend on which other walkers share its batch."""
    return np.einsum("nd,nd->n", a, b)


def _cos_rows(a: np.ndarray, q: np.ndarray) -> np.ndarray:
    """cos(a_i, q_i) for unit q_i; 0 where a_i is (nearly) zero."""
    na = np.sqrt(_rowdot(a, a))
    return np.where(na > 1e-9, _rowdot(a, q) / np.maximum(na, 1e-9), 0.0).astype(np.float32)


_WALKER_CHUNK = 96  # walkers whose [candidates, D] blocks are made at once (see candidate_arrays)


def pad_rows(rows: list, fill: int = -1) -> np.ndarray:
    """Tuples of ints as one [len(rows), longest] int64 array, ``fill`` as padding."""
    width = max([len(r) for r in rows] + [1])
    out = np.full((len(rows), width), fill, np.int64)
    for i, r in enumerate(rows):
        if r:
            out[i, :len(r)] = r
    return out


def candidate_arrays(graph: Graph, walkers: list, qvecs: np.ndarray, hop: int, max_hops: int,
                     linked: list, hidden: list, caches: list, dense: bool = True,
                     cap: int = ADJ_CAP) -> dict:
    """What each of many walkers can fetch next, as flat arrays (STOP is implicit).

    ``qvecs`` [B, D] is each walker's question vector, ``linked`` / ``hidden`` / ``caches``
    each walker's question's linked entities, hidden facts and pre-ranking cache (walkers
    of one question share them).  Returns ``seg`` [N] (the walker of each candidate, walkers
    in order, each walker's candidates in its offer order), ``facts``, ``dirs``, ``nexts``,
    ``feats`` [N, N_CHEAP], ``counts`` [B], ``stop_feats`` [B, N_STOP] and ``here`` [B].
    One walker's numbers do not depend on the others in the batch.
    """
    B = len(walkers)
    D = qvecs.shape[1] if qvecs.ndim == 2 else 0
    parts_f, parts_d, parts_x = [], [], []
    flat_filter = np.zeros(B, bool)  # walkers whose fetched facts are dropped below, in bulk
    dense_now = dense and hop == 0 and graph.n_facts > 0
    found: dict = {}  # walker -> its dense results, searched for all walkers at once
    if dense_now:
        need = [i for i, w in enumerate(walkers)
                if caches[i] is None or ("dense", w.fetched) not in caches[i]]
        if need:
            qs = []
            for i in need:
                w = walkers[i]
                query = qvecs[i] + (np.asarray(graph.fact_vecs[list(w.fetched)]).sum(0)
                                    if w.fetched else 0.0)
                qs.append(query / max(float(np.linalg.norm(query)), 1e-9))
            res = graph.dense_search_many(np.stack(qs).astype(np.float32), DENSE_K + cap,
                                          [set(walkers[i].fetched) | set(hidden[i]) for i in need])
            for i, r in zip(need, res):
                found[i] = r
                if caches[i] is not None:
                    caches[i][("dense", walkers[i].fetched)] = r
    pre: dict = {}  # the neighbour lists not cached yet, pre-ranked for all walkers at once
    for i, w in enumerate(walkers):
        if caches[i] is None or w.entity not in caches[i]:
            pre.setdefault((id(caches[i]) if caches[i] is not None else -1 - i, w.entity), i)
    if pre:
        reps = list(pre.values())
        for i, got in zip(reps, _preranked_many(graph, [walkers[i].entity for i in reps],
                                                qvecs[reps], cap)):
            if caches[i] is not None:
                caches[i][walkers[i].entity] = got
            else:
                pre[(-1 - i, walkers[i].entity)] = got
    for i, w in enumerate(walkers):
        c = caches[i]
        facts, dirs = c[w.entity] if c is not None else pre[(-1 - i, w.entity)]
        hid = hidden[i]
        if hid or (dense_now and w.fetched):
            keep = ~np.isin(facts, np.fromiter(set(w.fetched) | set(hid), np.int64))
            facts, dirs = facts[keep], dirs[keep]
        elif w.fetched:
            flat_filter[i] = True
        is_dense = None
        if dense_now:  # at the start only: recovers a poor entity link
            extra = found[i] if i in found else caches[i][("dense", w.fetched)]
            offered = set(map(int, facts))
            extra = np.array([f for f in extra if int(f) not in offered][:DENSE_K], np.int64)
            if len(extra):
                is_dense = np.concatenate([np.zeros(len(facts), np.float32),
                                           np.ones(2 * len(extra), np.float32)])
                facts = np.concatenate([facts, extra, extra])
                dirs = np.concatenate([dirs, np.zeros(len(extra), np.int8),
                                       np.ones(len(extra), np.int8)])
        parts_f.append(facts)
        parts_d.append(dirs)
        parts_x.append(is_dense if is_dense is not None else np.zeros(len(facts), np.float32))
    counts = np.array([len(f) for f in parts_f], np.int64)
    seg = np.repeat(np.arange(B), counts)
    facts = np.concatenate(parts_f) if B else np.zeros(0, np.int64)
    dirs = np.concatenate(parts_d).astype(np.int8) if B else np.zeros(0, np.int8)
    is_dense = np.concatenate(parts_x) if B else np.zeros(0, np.float32)
    fetched = pad_rows([w.fetched for w in walkers])         # [B, F], -1 padding
    if flat_filter.any():
        drop = flat_filter[seg] & (facts[:, None] == fetched[seg]).any(1)
        if drop.any():
            keep = ~drop
            facts, dirs, is_dense, seg = facts[keep], dirs[keep], is_dense[keep], seg[keep]
            counts = np.bincount(seg, minlength=B).astype(np.int64)
    here = np.array([w.entity for w in walkers], np.int64)
    nexts = np.where(dirs == 0, graph.obj[facts], graph.subj[facts]).astype(np.int64)
    # The text features read [candidates, D] blocks; they are made a few hundred walkers at
    # a time, so the blocks stay small and reused instead of fresh 50 MB arrays per hop.
    N = len(facts)
    sim_text = np.zeros(N, np.float32)
    sim_rel = np.zeros(N, np.float32)
    gain = np.zeros(N, np.float32)
    cover = np.zeros(B, np.float32)
    before = np.zeros(B, np.float32)
    ends = np.cumsum(counts)
    firsts = ends - counts
    for w0 in range(0, B, _WALKER_CHUNK):
        w1 = min(B, w0 + _WALKER_CHUNK)
        f_c = fetched[w0:w1]
        q_c = qvecs[w0:w1]
        # The path fetched so far (its vectors summed in order; padding adds exact zeros),
        # how well it covers the question, and how much each candidate would add: a path
        # that already says what the question asks is a reason to stop.
        has = f_c >= 0
        path = np.zeros((w1 - w0, D), np.float32)
        last = np.zeros((w1 - w0, D), np.float32)
        for j in range(f_c.shape[1]):
            if has[:, j].any():
                v = np.asarray(graph.fact_vecs[np.maximum(f_c[:, j], 0)]) * has[:, j, None]
                path += v
                last = np.where(has[:, j, None], v, last)
        n_fetched = has.sum(1)
        cover[w0:w1] = _cos_rows(path, q_c)
        before[w0:w1] = np.where(n_fetched > 0, _cos_rows(path - last, q_c), 0.0)
        a, b = int(firsts[w0]), int(ends[w1 - 1])
        if a == b:
            continue
        s = seg[a:b] - w0
        fv = np.asarray(graph.fact_vecs[facts[a:b]])
        qv = q_c[s]
        sim_text[a:b] = _rowdot(fv, qv)
        sim_rel[a:b] = _rowdot(np.asarray(graph.relation_vecs[graph.rel[facts[a:b]]]), qv)
        gain[a:b] = _cos_rows(path[s] + fv, qv) - cover[w0:w1][s]
    if N:
        visited = pad_rows([tuple(w.visited) + (w.entity,) for w in walkers])
        linked_p = pad_rows([tuple(s) for s in linked])
        deg = (graph.adj_ptr[nexts + 1] - graph.adj_ptr[nexts]).astype(np.float32)
        kind = graph.rel[facts].astype(np.int64) * 2 + dirs
        _, kinv, kcnt = np.unique(seg * (int(kind.max()) + 1) + kind, return_inverse=True,
                                  return_counts=True)
        kind_count = kcnt[kinv.reshape(-1)].astype(np.float32)
        feats = np.stack([
            sim_text,                                            # text similar to the question
            sim_rel,                                             # relation similar to the question
            dirs.astype(np.float32),                             # inverse direction
            is_dense,                                            # offered by dense search
            (nexts[:, None] == visited[seg]).any(1).astype(np.float32),   # goes back somewhere visited
            (nexts[:, None] == linked_p[seg]).any(1).astype(np.float32),  # goes to an entity the question names
            np.log1p(deg) / 5.0,                                 # how connected the next entity is
            np.full(N, (hop + 1) / max_hops, np.float32),        # how far into the walk
            -np.log(kind_count),                                 # share of its (relation, direction) kind
            gain,                                                # what it adds to the path's cover
        ], axis=1).astype(np.float32)
    else:
        feats = np.zeros((0, N_CHEAP), np.float32)
    deg_here = (graph.adj_ptr[here + 1] - graph.adj_ptr[here]).astype(np.float32)
    stop_feats = np.stack([
        np.full(B, hop == 0, np.float32),
        np.array([w.entity in s for w, s in zip(walkers, linked)], np.float32),
        np.full(B, hop / max_hops, np.float32),
        np.log1p(deg_here) / 5.0,
        cover, cover - before], axis=1).astype(np.float32) if B else np.zeros((0, N_STOP), np.float32)
    return {"seg": seg, "facts": facts, "dirs": dirs, "nexts": nexts, "feats": feats,
            "counts": counts, "stop_feats": stop_feats, "here": here,
            "paths": [path_kinds(graph, w) for w in walkers]}


def candidates_batch(graph: Graph, walkers: list, qvecs: np.ndarray, hop: int, max_hops: int,
                     linked: list, hidden: list, caches: list, dense: bool = True,
                     cap: int = ADJ_CAP) -> dict:
    """``candidate_arrays`` laid out as ``pad_candidates`` lays out a list of ``Candidates``
    (plus ``nexts`` [B, C] and ``counts`` [B])."""
    a = candidate_arrays(graph, walkers, qvecs, hop, max_hops, linked, hidden, caches,
                         dense=dense, cap=cap)
    B = len(walkers)
    counts = a["counts"]
    C = int(max(counts.max() if B else 0, 1))
    starts = np.concatenate([[0], np.cumsum(counts)[:-1]]) if B else np.zeros(0, np.int64)
    seg = a["seg"]
    pos = np.arange(len(seg)) - starts[seg]
    facts = np.full((B, C), -1, np.int64)
    dirs = np.zeros((B, C), np.int8)
    nexts = np.full((B, C), -1, np.int64)
    feats = np.zeros((B, C, N_CHEAP), np.float32)
    mask = np.zeros((B, C), bool)
    facts[seg, pos], dirs[seg, pos], nexts[seg, pos] = a["facts"], a["dirs"], a["nexts"]
    feats[seg, pos], mask[seg, pos] = a["feats"], True
    return {"facts": facts, "dirs": dirs, "feats": feats, "mask": mask,
            "stop_feats": a["stop_feats"], "here": a["here"], "nexts": nexts, "counts": counts,
            "paths": a["paths"]}


def candidates(graph: Graph, walker: Walker, qvec: np.ndarray, hop: int, max_hops: int,
               linked: frozenset, hidden: frozenset = frozenset(), dense: bool = True,
               prerank_cache: dict | None = None, cap: int = ADJ_CAP) -> Candidates:
    """The facts offered at this hop: touching facts (pre-ranked, capped) and a few dense ones.

    One walker's ``candidate_arrays`` (the same arithmetic as a batch of them).  ``hidden``
    facts are never offered (training hides the fact that states a completion answer, so the
    policy learns paths that work without it).
    """
    a = candidate_arrays(graph, [walker], np.asarray(qvec, np.float32)[None, :], hop, max_hops,
                         [linked], [hidden], [prerank_cache], dense=dense, cap=cap)
    return Candidates(a["facts"], a["dirs"], a["nexts"], a["feats"], a["stop_feats"][0],
                      walker.entity, a["paths"][0])


def pad_candidates(cands: list) -> dict:
    """Stack walkers' candidate lists into padded arrays (fact -1 and mask False as padding)."""
    B = len(cands)
    C = max([len(c.facts) for c in cands] + [1])
    facts = np.full((B, C), -1, np.int64)
    dirs = np.zeros((B, C), np.int8)
    feats = np.zeros((B, C, N_CHEAP), np.float32)
    mask = np.zeros((B, C), bool)
    for i, c in enumerate(cands):
        n = len(c.facts)
        facts[i, :n], dirs[i, :n], feats[i, :n], mask[i, :n] = c.facts, c.dirs, c.feats, True
    stop = np.stack([c.stop_feats for c in cands]) if cands else np.zeros((0, N_STOP), np.float32)
    here = np.array([c.here for c in cands], np.int64)
    return {"facts": facts, "dirs": dirs, "feats": feats, "mask": mask, "stop_feats": stop,
            "here": here, "paths": [c.path for c in cands]}


MASK = "X"  # stands in for the entity names of a question in the policy's view of it


def mask_names(text: str, names: list[str]) -> str:
    """The question with the named entities replaced by a placeholder.

    The policy reads this masked text, so "Who makes part KX-2041?" and "Who makes part
    QM-1128?" look the same to it: what to fetch depends on the wording, not on the name,
    which is what lets it generalise to entities no training question mentions.
    """
    for name in sorted(names, key=len, reverse=True):
        words = [re.escape(w) for w in name.split()]
        if words:
            text = re.sub(r"(?<!\w)" + r"\s+".join(words) + r"(?!\w)", MASK, text,
                          flags=re.IGNORECASE)
    return text


def question_words(text: str) -> tuple:
    """The words of a (masked) question, lower-cased, without the name placeholder."""
    return tuple(w for w in re.findall(r"[^\W\d_]+", text.lower()) if w != MASK.lower())


@dataclass
class Episode:
    """A question resolved against the graph: where walks start and what counts as right."""

    qvec: np.ndarray          # the question's vector (similarity features, dense search)
    qstate: np.ndarray        # the vector of the question with its names masked (policy state)
    starts: list
    gold: frozenset = frozenset()
    hidden: frozenset = frozenset()
    hops: int | None = None
    qrel: int = -1            # the asked relation (graph index) for completion questions
    prerank: dict = field(default_factory=dict)
    words: tuple = ()         # the masked question's words (policy.word_bag reads their vectors)
    word_vecs: np.ndarray | None = None  # [len(words), D]
    stated: frozenset = frozenset()  # completion questions: answers a visible fact already
    #                                  states; the policy sees which ends these are (a walk that
    #                                  ends there tells nothing new) and training rewards them 0


def answer_facts(graph: Graph, subject: int, relation: str) -> dict:
    """{fact row: the answer it states} for every fact stating an answer of (subject, relation)."""
    facts, dirs = graph.neighbours(subject)
    try:
        r = graph.relation_names.index(relation)
    except ValueError:
        return {}
    return {int(f): int(graph.obj[f]) for f, d in zip(facts, dirs) if d == 0 and graph.rel[f] == r}


def hidden_facts(graph: Graph, subject: int, relation: str, gold: frozenset) -> frozenset:
    """The facts that state a completion answer directly, hidden from the walk in training."""
    return frozenset(f for f, a in answer_facts(graph, subject, relation).items() if a in gold)


def stated_answers(graph: Graph, subject: int, relation: str, hidden: frozenset) -> frozenset:
    """The answers of (subject, relation) that a fact the walk can see already states."""
    return frozenset(a for f, a in answer_facts(graph, subject, relation).items()
                     if f not in hidden)


def one_answer_each(graph: Graph, eps: list) -> list:
    """Completion training episodes as the test meets a query: one stated answer hidden.

    A question (s, R, {a1..an}) whose answers the store states becomes n episodes; episode i
    hides the facts stating a_i (gold: a_i and any answer no fact states) and leaves the
    others visible, as ``stated``: the store already says them, so ending there earns nothing.
    Training on all answers hidden at once teaches the walk to find exactly the answers a
    filtered test removes, on a graph unlike the test's, where the other answers of the same
    query are visible.  Other episodes pass unchanged.
    """
    out = []
    for ep in eps:
        if not (ep.starts and ep.qrel >= 0):
            out.append(ep)
            continue
        by_answer: dict = {}
        for f, a in answer_facts(graph, ep.starts[0], graph.relation_names[ep.qrel]).items():
            by_answer.setdefault(a, set()).add(f)
        stated = [a for a in sorted(by_answer) if a in ep.gold]
        if not stated:
            out.append(ep)
            continue
        unstated = ep.gold - set(stated)
        for a in stated:
            out.append(replace(ep, gold=frozenset({a}) | unstated,
                               hidden=frozenset(by_answer[a]),
                               stated=frozenset(by_answer) - {a}, prerank={}))
    return out


CHAIN_REACH = 200_000  # entities a question's chain search may hold at one depth before giving up


def answer_chains(graph: Graph, ep: Episode, max_hops: int) -> set:
    """The kind sequences (relation * 2 + direction per hop) of the shortest paths from a
    question's start to one of its answers: breadth first, every sequence of kinds kept
    apart with the entities it reaches.  Empty when no answer lies within ``max_hops`` or
    the search passes ``CHAIN_REACH`` entities at one depth (a hub-heavy question)."""
    gold = np.fromiter(ep.gold, np.int64)
    level = {(): np.unique(np.asarray(ep.starts, np.int64))}
    for _ in range(max_hops):
        nxt: dict = {}
        for seq, ents in level.items():
            lo = graph.adj_ptr[ents].astype(np.int64)
            lens = (graph.adj_ptr[ents + 1] - graph.adj_ptr[ents]).astype(np.int64)
            if not lens.sum():
                continue
            pos = np.repeat(lo - np.cumsum(lens) + lens, lens) + np.arange(int(lens.sum()))
            facts = np.asarray(graph.adj_fact[pos], np.int64)
            dirs = np.asarray(graph.adj_dir[pos], np.int64)
            keep = ~np.isin(facts, np.fromiter(ep.hidden, np.int64)) if ep.hidden else slice(None)
            facts, dirs = facts[keep], dirs[keep]
            kinds = graph.rel[facts].astype(np.int64) * 2 + dirs
            far = np.where(dirs == 0, graph.obj[facts], graph.subj[facts]).astype(np.int64)
            for k in np.unique(kinds):
                nxt[seq + (int(k),)] = np.unique(far[kinds == k])
        found = {seq for seq, ents in nxt.items() if np.isin(ents, gold).any()}
        if found:
            return found
        if not nxt or sum(len(e) for e in nxt.values()) > CHAIN_REACH:
            return set()
        level = nxt
    return set()


def question_chains(graph: Graph, eps: list, max_hops: int, min_share: float = 0.02) -> list:
    """The chains training questions are answered by: kind sequences that are a shortest
    answer path of at least ``min_share`` of the questions in words (completion questions,
    whose paths are the walk's to find, take no part), most common first.  A path that
    reaches an answer by coincidence (a supplier shipping from the city it is based in)
    stays under the share unless it is common."""
    from collections import Counter

    asked = [ep for ep in eps if ep.qrel < 0 and ep.starts and ep.gold]
    counts = Counter(seq for ep in asked for seq in answer_chains(graph, ep, max_hops))
    least = max(1.0, min_share * len(asked))
    return [list(seq) for seq, c in sorted(counts.items(), key=lambda kv: (-kv[1], kv[0]))
            if c >= least]


def episodes(graph: Graph, questions: list, encode, hide_answers: bool = False) -> list:
    """Resolve questions: link start entities, encode the raw and the masked wording.

    ``encode`` maps a list of texts to unit vectors.  With ``hide_answers`` (training on
    completion questions) the facts that state the answer directly are hidden.

    Every text is encoded once however many questions share it (questions of one template
    share their masked wording), and in one encoder call: the raw questions, the masked
    wordings and their words together.  Only a question that names no entity needs its raw
    vector before it can be masked (the dense entity link); those take a second call.
    """
    vec: dict = {}

    def encode_new(texts):
        todo = list(dict.fromkeys(t for t in texts if t not in vec))
        if todo:
            vec.update(zip(todo, encode(todo)))

    starts: list = [None] * len(questions)
    for i, q in enumerate(questions):
        if q.is_completion:
            s = graph.entity_index(q.subject)
            starts[i] = [s] if s is not None else []
        else:
            st = graph.link(q.text)  # by name; no vector needed
            if st or len(graph.entity_vecs) == 0:
                starts[i] = st
    masked = [None if st is None else mask_names(q.text, [graph.entity_names[e] for e in st])
              for q, st in zip(questions, starts)]
    words = [None if m is None else question_words(m) for m in masked]
    encode_new([q.text for q in questions]
               + [m for m in masked if m is not None]
               + [w for ws in words if ws is not None for w in ws])
    late = [i for i, st in enumerate(starts) if st is None]
    for i in late:  # the dense entity link, with the question's vector
        q = questions[i]
        starts[i] = graph.link(q.text, vec[q.text])
        masked[i] = mask_names(q.text, [graph.entity_names[e] for e in starts[i]])
        words[i] = question_words(masked[i])
    if late:
        encode_new([masked[i] for i in late] + [w for i in late for w in words[i]])
    dim = len(next(iter(vec.values()))) if vec else 0
    out = []
    for q, st, m, ws in zip(questions, starts, masked, words):
        v = vec[q.text]
        qstate = np.asarray(vec[m], np.float32)
        gold = frozenset(e for e in (graph.entity_index(a) for a in q.answers) if e is not None)
        hidden = hidden_facts(graph, st[0], q.relation, gold) if (
            hide_answers and q.is_completion and st) else frozenset()
        qrel = graph.relation_names.index(q.relation) if q.is_completion and \
            q.relation in graph.relation_names else -1
        wv = np.array([vec[w] for w in ws], np.float32).reshape(len(ws), dim)
        stated = stated_answers(graph, st[0], q.relation, hidden) if (
            q.is_completion and st) else frozenset()
        out.append(Episode(np.asarray(v, np.float32), qstate, st, gold, hidden, q.hops, qrel,
                           words=ws, word_vecs=wv, stated=stated))
    return out
