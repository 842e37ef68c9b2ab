"""Shared fixtures: a tiny in-memory graph with random unit vectors (invented unit-test data)."""
from __future__ import annotations

import os

import numpy as np
import pytest

os.environ.setdefault("HF_HUB_OFFLINE", "1")
os.environ.setdefault("TRANSFORMERS_OFFLINE", "1")
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")


def make_graph(triples, dim=16, seed=0):
    """A Graph from (subject, relation, object) name triples, with random unit vectors."""
    from hopper.env import Graph

    rng = np.random.default_rng(seed)
    ents, rels = [], []
    for s, r, o in triples:
        for e in (s, o):
            if e not in ents:
                ents.append(e)
        if r not in rels:
            rels.append(r)

    def unit(n):
        v = rng.standard_normal((n, dim)).astype(np.float32)
        return v / np.linalg.norm(v, axis=1, keepdims=True)

    subj = np.array([ents.index(s) for s, _, _ in triples], np.int32)
    obj = np.array([ents.index(o) for _, _, o in triples], np.int32)
    rel = np.array([rels.index(r) for _, r, _ in triples], np.int32)
    ends = np.concatenate([subj, obj]).astype(np.int64)
    fidx = np.concatenate([np.arange(len(subj)), np.arange(len(obj))]).astype(np.int32)
    dirs = np.concatenate([np.zeros(len(subj), np.int8), np.ones(len(obj), np.int8)])
    order = np.argsort(ends, kind="stable")
    ptr = np.zeros(len(ents) + 1, np.int64)
    np.add.at(ptr, ends + 1, 1)
    arrays = {"fact_ids": np.arange(1, len(triples) + 1, dtype=np.int64), "subj": subj,
              "rel": rel, "obj": obj, "fact_vecs": unit(len(triples)), "entity_vecs": unit(len(ents)),
              "relation_vecs": unit(len(rels)), "adj_ptr": np.cumsum(ptr),
              "adj_fact": fidx[order], "adj_dir": dirs[order]}
    return Graph(arrays, ents, rels, facts_version=1)


@pytest.fixture
def tiny_graph():
    return make_graph([("a", "r1", "b"), ("b", "r2", "c"), ("a", "r3", "d"), ("d", "r2", "e"),
                       ("b", "r3", "e")])


ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
DEMO = os.path.join(ROOT, "factstores", "supply")


def demo_questions(split, per_chain=None, wording=None):
    """Question dicts from the demo split, optionally a balanced subset per chain."""
    import json

    rows = [json.loads(line) for line in open(os.path.join(DEMO, f"questions_{split}.jsonl"), encoding="utf-8")]
    if wording:
        rows = [r for r in rows if r["wording"] == wording]
    if per_chain is None:
        return rows
    seen: dict = {}
    out = []
    for r in rows:
        if seen.get(r["chain"], 0) < per_chain:
            seen[r["chain"]] = seen.get(r["chain"], 0) + 1
            out.append(r)
    return out


@pytest.fixture(scope="session")
def demo_store(tmp_path_factory):
    """The demo facts loaded into a fresh store (embedding ~10k texts once per session)."""
    import hopper

    path = tmp_path_factory.mktemp("demo") / "demo.duckdb"
    hp = hopper.open_store(path)
    hp.load([os.path.join(DEMO, "facts.csv")])
    return hp


@pytest.fixture(scope="session")
def trained_demo(demo_store):
    """A policy trained on a reduced demo training set (a few minutes at most on 2 cores)."""
    summary = demo_store.train(demo_questions("train", per_chain=60),
                               valid=demo_questions("valid", per_chain=8), seed=0,
                               epochs=12, patience=4)
    return demo_store, summary
