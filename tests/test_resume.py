"""An interrupted load leaves the store as it was and its re-run embeds only what is missing."""
from __future__ import annotations

import tempfile

import duckdb
import numpy as np
import pytest

import hopper.load as load_mod
from helpers import write_csv
from hopper import embed
from hopper.api import Hopper
from hopper.store import Store
from hopper.pending import PendingVectors, key_sql, text_key


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
    (p.folder / "chunk-broken-1.parquet").write_bytes(b"not parquet")
    assert p.keys({text_key(t) for t in ("b", "c", "zzz")}) == {text_key("b"), text_key("c")}
    con = duckdb.connect()
    got = dict(con.execute(f"SELECT key, embedding FROM {p.sql_source(con)}").fetchall())
    np.testing.assert_array_equal(np.array(got[text_key("c")], np.float32), v[2])
    assert text_key("a") != text_key("a ")
    p.clear()
    assert p.keys({text_key("a")}) == set()


def test_text_key_is_sha256_in_python_and_in_duckdb():
    # SHA-256("abc") from FIPS 180-2, appendix B.1 (the standard's own worked example)
    assert text_key("abc") == "ba7816bf8f01cfea414140de5dae2223"
    con = duckdb.connect()
    for text in ("abc", "Café Ünïcode", "☃ snow · 雪", "tab\there", ""):
        assert con.execute(f"SELECT {key_sql('?')}", [text]).fetchall()[0][0] == text_key(text)


def test_a_text_saved_twice_gives_one_vector(tmp_path):
    # two loads of one store running at once may both save a text
    p = PendingVectors(tmp_path / "s.duckdb", "ab" * 32)
    v = np.eye(2, 384, dtype=np.float32)
    p.save(["a", "b"], v)
    p.save(["b"], v[1:])
    con = duckdb.connect()
    rows = con.execute(f"SELECT key FROM {p.sql_source(con)} ORDER BY key").fetchall()
    assert sorted(r[0] for r in rows) == sorted([text_key("a"), text_key("b")])


def test_load_works_where_the_pending_folder_cannot_be_made(tmp_path, monkeypatch):
    private = tmp_path / "tmp"
    private.mkdir()
    monkeypatch.setattr(tempfile, "tempdir", str(private))  # where the private folder goes
    store = tmp_path / "s.duckdb"
    (tmp_path / "s.duckdb.cache").write_text("a file where the folder would go")
    f = write_facts(tmp_path / "facts.csv", 30)
    report = run_load(store, f, CountingEncoder())
    assert report["facts_added"] == 30
    texts, vecs = stored_vectors(store)
    clean = embed.Encoder("auto").encode(texts)
    assert np.min(np.sum(vecs * clean, axis=1)) > 0.9999
    assert not list(private.iterdir())  # the private folder was used, and removed after


def test_chunks_taken_away_before_the_write_are_embedded_again_under_the_lock(tmp_path, monkeypatch):
    # A load that commits while this one waits for the lock removes the chunks it used, which
    # may hold texts this one needs: the write transaction checks the chunks on disk again.
    store = tmp_path / "s.duckdb"
    f = write_facts(tmp_path / "facts.csv", 30)
    real_write = load_mod._write

    def write_after_losing_the_chunks(store_, stage, report, identity, precision, new_items,
                                      embed_missing, pending):
        for chunk in pending.folder.glob("chunk-*.parquet"):
            chunk.unlink()
        return real_write(store_, stage, report, identity, precision, new_items, embed_missing,
                          pending)

    monkeypatch.setattr(load_mod, "_write", write_after_losing_the_chunks)
    enc = CountingEncoder()
    report = run_load(store, f, enc)
    total = 30 + 37 + 1  # facts, entities (30 parts, 7 makers), relation
    assert report["facts_added"] == 30 and len(enc.texts) == 2 * total
    texts, vecs = stored_vectors(store)
    clean = embed.Encoder("auto").encode(texts)
    assert np.min(np.sum(vecs * clean, axis=1)) > 0.9999
