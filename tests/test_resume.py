"""An interrupted load leaves the store as it was and its re-run embeds only what is missing."""
from __future__ import annotations

import duckdb
import numpy as np
import pytest

import hopper.load as load_mod
from helpers import write_csv
from hopper import embed
from hopper.api import Hopper
from hopper.store import Store
from hopper.pending import PendingVectors, text_key


def write_facts(path, n):
    """Invented facts: part P-i is made by maker M-(i mod 7)."""
    return write_csv(path, [(f"P-{i:04d}", "made by", f"Maker {i % 7}") for i in range(n)])


class CountingEncoder:
    """The real fast encoder, counting the texts it embeds; can fail on its n-th call."""

    def __init__(self, fail_on_call=None, precision="fp32"):
        self.inner = embed.Encoder("auto", precision=precision)
        self.precision = self.inner.precision
        self.texts = []
        self.calls = 0
        self.fail_on_call = fail_on_call

    def encode(self, texts, **kw):
        self.calls += 1
        if self.fail_on_call is not None and self.calls >= self.fail_on_call:
            raise KeyboardInterrupt("simulated interruption")
        self.texts += list(texts)
        return self.inner.encode(texts, **kw)


def run_load(store, path, encoder):
    return load_mod.load(Store(store), [path], encoder=encoder).as_dict()


def stored_vectors(path):
    con = duckdb.connect(str(path), read_only=True)
    try:
        rows = con.execute("SELECT f.text, v.embedding FROM facts f JOIN fact_vectors v "
                           "USING (fact_id) ORDER BY f.text").fetchall()
    finally:
        con.close()
    return [r[0] for r in rows], np.array([r[1] for r in rows], np.float32)


def test_interrupted_load_resumes_embedding_only_the_rest(tmp_path, monkeypatch):
    monkeypatch.setattr(load_mod, "CHUNK", 40)
    f = write_facts(tmp_path / "facts.csv", 150)  # 150 facts + 157 entities + 1 relation
    store = tmp_path / "s.duckdb"
    first = CountingEncoder(fail_on_call=2)  # dies after the first chunk of 40 texts
    with pytest.raises(KeyboardInterrupt):
        run_load(store, f, first)
    assert not store.exists()  # the store did not exist before: nothing is left behind
    assert len(first.texts) == 40
    again = CountingEncoder()
    report = run_load(store, f, again)
    total = 150 + 157 + 1
    assert report["facts_added"] == 150
    assert report["reused"] == 40 and report["embedded"] == total - 40
    assert len(again.texts) == total - 40
    assert not set(again.texts) & set(first.texts)  # nothing embedded twice
    # the reused vectors are the ones a clean load makes
    texts, vecs = stored_vectors(store)
    clean = embed.Encoder("auto").encode(texts)
    assert np.min(np.sum(vecs * clean, axis=1)) > 0.9999
    # committed: the saved chunks are gone
    assert not PendingVectors(store, embed.model_identity()["weights_sha256"]).folder.exists()


def test_failed_load_into_existing_store_leaves_it_as_it_was(tmp_path, monkeypatch):
    monkeypatch.setattr(load_mod, "CHUNK", 40)
    store = tmp_path / "s.duckdb"
    Hopper(store).load([write_facts(tmp_path / "a.csv", 20)])  # a new store: int8 vectors
    before = stored_vectors(store)
    f = write_facts(tmp_path / "b.csv", 120)  # 100 new facts, 100 new entities
    with pytest.raises(KeyboardInterrupt):
        run_load(store, f, CountingEncoder(fail_on_call=3, precision="int8"))
    after = stored_vectors(store)
    assert after[0] == before[0] and np.array_equal(after[1], before[1])
    again = CountingEncoder(precision="int8")
    report = run_load(store, f, again)
    assert report["facts_added"] == 100 and report["reused"] == 80
    assert report["embedded"] == 200 - 80 == len(again.texts)


def test_pending_chunks_ignore_damage_and_other_texts(tmp_path):
    p = PendingVectors(tmp_path / "s.duckdb", "ab" * 32)
    v = np.eye(3, 384, dtype=np.float32)
    p.save(["a", "b", "c"], v)
    (p.folder / "chunk-broken-1.npz").write_bytes(b"not a zip")
    got = p.read({"b", "c", "zzz"})
    assert sorted(got) == ["b", "c"]
    np.testing.assert_array_equal(got["c"], v[2])
    assert text_key("a") != text_key("a ")
    p.clear()
    assert p.read({"a"}) == {}
