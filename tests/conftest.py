"""Shared fixtures: a tiny in-memory graph (invented unit-test data) and the demo store.

Plain helper functions live in ``helpers.py``."""
from __future__ import annotations

import os

import pytest

from helpers import DEMO, demo_questions, make_graph

os.environ.setdefault("HF_HUB_OFFLINE", "1")
os.environ.setdefault("TRANSFORMERS_OFFLINE", "1")
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")


@pytest.fixture
def tiny_graph():
    return make_graph([("a", "r1", "b"), ("b", "r2", "c"), ("a", "r3", "d"), ("d", "r2", "e"),
                       ("b", "r3", "e")])


@pytest.fixture(scope="session")
def demo_store(tmp_path_factory):
    """The demo facts loaded into a fresh store (embedding ~10k texts once per session)."""
    import hopper

    path = tmp_path_factory.mktemp("demo") / "demo.duckdb"
    hp = hopper.open_store(path)
    hp.load([DEMO / "facts.csv"])
    return hp


@pytest.fixture(scope="session")
def trained_demo(demo_store):
    """A policy trained on a reduced demo training set (a few minutes at most on 2 cores)."""
    summary = demo_store.train(demo_questions("train", per_chain=60),
                               valid=demo_questions("valid", per_chain=8), seed=0,
                               epochs=12, patience=4)
    return demo_store, summary
