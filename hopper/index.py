"""Inverted-file (IVF) index over the fact vectors: k-means lists, a few probed instead of a full scan."""
from __future__ import annotations

import json
import math
import os
import shutil
from pathlib import Path

import numpy as np

# Below this many facts the exact scan (one matrix-vector product) is about as fast as
# probing lists and needs nothing built: no index is made.  See scripts/bench.
# HOPPER_IVF_MIN_FACTS overrides it (tests use it to index small stores).
EXACT_BELOW = 20_000
TARGET_RECALL = 0.98      # nprobe is the smallest giving this recall@10 on calibration queries
_FILES = ("centroids", "list_ptr", "list_rows", "list_vecs")
_FORMAT = 2


def mapped(path: Path) -> np.ndarray:
    """An ``.npy`` file memory-mapped read-only, as a plain ndarray view (no pickle).

    ``np.memmap`` runs Python code on every indexing; a plain view of the same mapping does
    not, which made a batch of answers half a second faster per hundred questions.
    """
    return np.load(path, mmap_mode="r", allow_pickle=False).view(np.ndarray)


def min_facts() -> int:
    """Stores with at least this many facts get an IVF index (HOPPER_IVF_MIN_FACTS, else EXACT_BELOW)."""
    raw = os.environ.get("HOPPER_IVF_MIN_FACTS")
    if raw is None or raw.strip() == "":
        return EXACT_BELOW
    try:
        value = int(raw)
    except ValueError:
        value = -1
    if value < 1:
        from .errors import InputError
        raise InputError(f"must be a whole number of at least 1 (got {raw!r})",
                         field="HOPPER_IVF_MIN_FACTS")
    return value


RESCORE = 8  # past the k-th, this many more rows are scored again before the cut (see _best)


def _best(scores: np.ndarray, rows: np.ndarray, vectors_at, query: np.ndarray, k: int) -> np.ndarray:
    """The ``k`` best ``rows`` by ``scores`` (from a matrix product), best first, ties by row.

    BLAS sums a column of a matrix product in an order that depends on how many columns it
    holds, so one query alone and the same query in a batch get scores a few 1e-5 apart, and
    near ties would be cut or ordered differently.  The best k + RESCORE are therefore scored
    again one row at a time (``np.einsum``, no BLAS; ``vectors_at(i)`` gives the vectors of
    positions i) and ranked on those scores: the answer does not depend on the batch.
    """
    n = len(scores)
    k = min(k, n)
    if k <= 0:
        return np.zeros(0, np.int64)
    pool = min(n, k + RESCORE)
    cand = np.argpartition(-scores, pool - 1)[:pool] if pool < n else np.arange(n)
    exact = np.einsum("nd,d->n", np.asarray(vectors_at(cand), np.float32),
                      np.asarray(query, np.float32))
    return np.asarray(rows)[cand[np.lexsort((np.asarray(rows)[cand], -exact))[:k]]].astype(np.int64)


def exact_search(vecs: np.ndarray, query: np.ndarray, k: int) -> np.ndarray:
    """Rows of ``vecs`` with the highest inner product with ``query``, best first (numpy scan)."""
    n = len(vecs)
    if n == 0 or k <= 0:
        return np.zeros(0, np.int64)
    return _best(np.asarray(vecs) @ query, np.arange(n), lambda i: vecs[i], query, k)


def exact_search_many(vecs: np.ndarray, queries: np.ndarray, ks) -> list:
    """``exact_search`` for many queries: one matrix product for all of them."""
    n = len(vecs)
    if n == 0 or len(queries) == 0:
        return [np.zeros(0, np.int64) for _ in range(len(queries))]
    sims = np.asarray(vecs) @ np.asarray(queries, np.float32).T  # [n, m]
    out = []
    for i, k in enumerate(ks):
        k = min(n, int(k))
        if k <= 0:
            out.append(np.zeros(0, np.int64))
            continue
        out.append(_best(sims[:, i], np.arange(n), lambda r: vecs[r], queries[i], k))
    return out


class IVFIndex:
    """k-means centroids and, per centroid, the rows assigned to it with their vectors.

    ``list_vecs`` is a float32 copy of the vectors in list order, so a probed list is one
    contiguous block (float16 would halve it, but converting it back cost more than the scan
    it saves on this machine's numpy).  Scores are exact; only the choice of lists is not.
    """

    def __init__(self, centroids, list_ptr, list_rows, list_vecs, nprobe: int):
        self.centroids = centroids
        self.list_ptr = list_ptr
        self.list_rows = list_rows
        self.list_vecs = list_vecs
        self.nprobe = int(nprobe)

    @property
    def n_lists(self) -> int:
        return len(self.centroids)

    # -- building (imports scikit-learn: load and train only, never `ask`) -------------------
    @classmethod
    def build(cls, vecs: np.ndarray, n_lists: int | None = None, seed: int = 0,
              nprobe: int | None = None, target_recall: float = TARGET_RECALL) -> "IVFIndex":
        from sklearn.cluster import MiniBatchKMeans

        vecs = np.ascontiguousarray(vecs, np.float32)
        n = len(vecs)
        if n == 0:
            raise ValueError("cannot index zero vectors")
        n_lists = int(n_lists or max(1, round(math.sqrt(n))))
        n_lists = min(n_lists, n)
        km = MiniBatchKMeans(n_clusters=n_lists, random_state=seed, batch_size=4096,
                             n_init=1, max_iter=20, max_no_improvement=5)
        rng = np.random.default_rng(seed)
        sample = vecs if n <= 200 * n_lists else vecs[rng.choice(n, 200 * n_lists, replace=False)]
        km.fit(sample)
        cents = km.cluster_centers_.astype(np.float32)
        cents /= np.maximum(np.linalg.norm(cents, axis=1, keepdims=True), 1e-9)
        # Assign every vector to its most similar unit centroid: the same score probes use.
        labels = np.empty(n, np.int64)
        for a in range(0, n, 65536):
            labels[a:a + 65536] = np.argmax(vecs[a:a + 65536] @ cents.T, axis=1)
        order = np.argsort(labels, kind="stable")
        ptr = np.zeros(n_lists + 1, np.int64)
        ptr[1:] = np.cumsum(np.bincount(labels, minlength=n_lists))
        index = cls(cents, ptr, order.astype(np.int32), vecs[order], 1)
        index.nprobe = nprobe or index.calibrate(vecs, target_recall, seed)
        return index

    def calibrate(self, vecs: np.ndarray, target: float, seed: int = 0, n_queries: int = 200,
                  k: int = 10) -> int:
        """The smallest nprobe whose recall@k against the exact scan reaches ``target``.

        Queries are fact vectors with as much random noise added as signal (then unit
        length): off the facts themselves, as a question's vector is.
        """
        rng = np.random.default_rng(seed + 1)
        rows = rng.choice(len(vecs), min(n_queries, len(vecs)), replace=False)
        noise = rng.standard_normal((len(rows), vecs.shape[1])).astype(np.float32)
        noise /= np.linalg.norm(noise, axis=1, keepdims=True)
        queries = vecs[rows] + noise
        queries /= np.linalg.norm(queries, axis=1, keepdims=True)
        truth = [set(exact_search(vecs, q, k).tolist()) for q in queries]
        probe = 1
        while probe < self.n_lists:
            self.nprobe = probe
            got = [len(t & set(self.search(q, k).tolist())) / len(t)
                   for q, t in zip(queries, truth)]
            if float(np.mean(got)) >= target:
                return probe
            probe *= 2
        return self.n_lists

    # -- searching ---------------------------------------------------------------------------
    def search(self, query: np.ndarray, k: int, nprobe: int | None = None) -> np.ndarray:
        """Up to ``k`` rows most similar to ``query`` among the probed lists, best first.

        More lists are probed when the first ``nprobe`` hold fewer than ``k`` rows.  Each
        list is scored in place (one small matrix-vector product per list, no copy).
        """
        if k <= 0:
            return np.zeros(0, np.int64)
        nprobe = min(self.n_lists, nprobe or self.nprobe)
        order = self._probe_order(np.asarray(self.centroids) @ query, query, nprobe)
        ptr = self.list_ptr
        sizes = ptr[order + 1] - ptr[order]
        while nprobe < self.n_lists and int(sizes[:nprobe].sum()) < k:
            nprobe *= 2
        lists = order[:nprobe]
        if len(lists) == 0:
            return np.zeros(0, np.int64)
        scores = np.concatenate([self.list_vecs[ptr[c]:ptr[c + 1]] @ query for c in lists])
        return self._best_in(lists, scores, query, k)

    def _best_in(self, lists, scores, query, k) -> np.ndarray:
        """The k best rows of the probed ``lists`` (``scores`` in list order), ties by row."""
        ptr = self.list_ptr
        at = np.concatenate([np.arange(ptr[c], ptr[c + 1]) for c in lists])  # list_vecs rows
        return _best(scores, np.asarray(self.list_rows[at], np.int64),
                     lambda i: self.list_vecs[at[i]], query, k)

    def _probe_order(self, cscores: np.ndarray, query: np.ndarray, nprobe: int) -> np.ndarray:
        """Lists by their centroid's score, best first; the first ones (what is probed, with
        room to double) scored again one at a time so the order does not depend on the batch."""
        order = np.argsort(-cscores, kind="stable")
        head = np.sort(order[:min(len(order), 2 * nprobe + RESCORE)])
        exact = np.einsum("nd,d->n", np.asarray(self.centroids[head], np.float32),
                          np.asarray(query, np.float32))
        return np.concatenate([head[np.lexsort((head, -exact))], order[len(head):]])

    def search_many(self, queries: np.ndarray, ks) -> list:
        """``search`` for many queries: each probed list is scored once for all the queries
        probing it (one matrix product per list instead of one per list and query).
        ``ks`` [m]: how many rows each query wants.  The same lists are probed, the same
        rows scored and ranked as by ``search``."""
        queries = np.asarray(queries, np.float32)
        m = len(queries)
        if m == 0:
            return []
        nprobe0 = min(self.n_lists, self.nprobe)
        cscores = queries @ np.asarray(self.centroids).T
        order = [self._probe_order(cscores[i], queries[i], nprobe0) for i in range(m)]
        ptr = self.list_ptr
        probes = []
        for i in range(m):
            nprobe = nprobe0
            sizes = ptr[order[i] + 1] - ptr[order[i]]
            while nprobe < self.n_lists and int(sizes[:nprobe].sum()) < ks[i]:
                nprobe *= 2
            probes.append(order[i][:nprobe])
        who: dict = {}  # list -> the queries probing it
        for i, lists in enumerate(probes):
            for c in lists.tolist():
                who.setdefault(c, []).append(i)
        part: dict = {}
        for c, qs in who.items():
            block = self.list_vecs[ptr[c]:ptr[c + 1]] @ queries[qs].T  # [list size, len(qs)]
            for j, i in enumerate(qs):
                part[(i, c)] = block[:, j]
        out = []
        for i, lists in enumerate(probes):
            k = int(ks[i])
            if k <= 0 or len(lists) == 0:
                out.append(np.zeros(0, np.int64))
                continue
            scores = np.concatenate([part[(i, c)] for c in lists.tolist()])
            out.append(self._best_in(lists, scores, queries[i], k))
        return out

    # -- files: plain .npy (no pickle) plus a small JSON ------------------------------------
    def save(self, folder: Path) -> None:
        """Write the index into ``folder`` atomically (a temporary folder renamed into place)."""
        from .files import publish_folder

        def build(tmp: Path) -> None:
            for name in _FILES:
                np.save(tmp / f"{name}.npy", getattr(self, name), allow_pickle=False)
            (tmp / "ivf.json").write_text(json.dumps(
                {"format": _FORMAT, "nprobe": self.nprobe, "n_lists": self.n_lists}), "utf-8")

        folder = Path(folder)
        if folder.exists() and IVFIndex.read(folder) is None:  # an older format or damaged
            shutil.rmtree(folder, ignore_errors=True)
        publish_folder(build, folder, "ivf.json")

    @classmethod
    def read(cls, folder: Path) -> "IVFIndex | None":
        """The index saved in ``folder``, memory-mapped; None when there is none (or it is damaged)."""
        folder = Path(folder)
        try:
            meta = json.loads((folder / "ivf.json").read_text("utf-8"))
            if meta.get("format") != _FORMAT:
                return None
            arrays = {n: mapped(folder / f"{n}.npy") for n in _FILES}
        except (OSError, ValueError):
            return None
        return cls(arrays["centroids"], arrays["list_ptr"], arrays["list_rows"],
                   arrays["list_vecs"], int(meta["nprobe"]))
