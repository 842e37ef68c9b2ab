"""The chains training questions are answered by: found by breadth-first search, marked for
the policy (on a chain, a chain complete), the same on numpy and torch.

The graph is the invented tiny one of conftest (a -r1-> b -r2-> c, a -r3-> d -r2-> e,
b -r3-> e); the expected chains are worked out by hand from it.
"""
from __future__ import annotations

import numpy as np

from hopper import policy as pol
from hopper.env import (Episode, Walker, answer_chains, candidates, pad_candidates, pad_rows,
                        question_chains)

R1, R2, R3 = 0, 1, 2  # relation rows of the tiny graph, in order of first use


def kind(rel, inverse=False):
    return rel * 2 + int(inverse)


def _ep(g, start, gold, qrel=-1):
    return Episode(qvec=np.zeros(16, np.float32), qstate=np.zeros(16, np.float32),
                   starts=[g.entity_index(start)], gold=frozenset(g.entity_index(x) for x in gold),
                   qrel=qrel)


def test_answer_chains_are_the_shortest_paths_kinds(tiny_graph):
    g = tiny_graph
    # a -> c: only a -r1-> b -r2-> c
    assert answer_chains(g, _ep(g, "a", ["c"]), 4) == {(kind(R1), kind(R2))}
    # a -> e: two paths of two hops (r1 then r3, r3 then r2); the longer ones are not chains
    assert answer_chains(g, _ep(g, "a", ["e"]), 4) == {(kind(R1), kind(R3)), (kind(R3), kind(R2))}
    # c -> a walks facts backwards: r2 inverse, then r1 inverse
    assert answer_chains(g, _ep(g, "c", ["a"]), 4) == {(kind(R2, True), kind(R1, True))}
    # out of reach within the hop limit: no chain
    assert answer_chains(g, _ep(g, "a", ["c"]), 1) == set()


def test_question_chains_keep_the_common_ones(tiny_graph):
    g = tiny_graph
    eps = [_ep(g, "a", ["c"])] * 3 + [_ep(g, "a", ["b"])] + [_ep(g, "a", ["b"], qrel=R1)] * 5
    # completion questions (qrel >= 0) take no part; a chain needs min_share of the others
    assert question_chains(g, eps, 4, min_share=0.5) == [[kind(R1), kind(R2)]]
    assert question_chains(g, eps, 4, min_share=0.0) == [[kind(R1), kind(R2)], [kind(R1)]]


def test_path_kinds_read_each_fetchs_direction_from_where_it_led(tiny_graph):
    from hopper.env import path_kinds

    g = tiny_graph
    a, b, c, e = (g.entity_index(x) for x in "abce")
    f_ab = int(np.flatnonzero((g.subj == a) & (g.rel == R1))[0])
    f_bc = int(np.flatnonzero((g.subj == b) & (g.rel == R2))[0])
    f_be = int(np.flatnonzero((g.subj == b) & (g.rel == R3))[0])
    assert path_kinds(g, Walker(c, (f_ab, f_bc), (a, b, c))) == (kind(R1), kind(R2))
    assert path_kinds(g, Walker(b, (f_be,), (e, b))) == (kind(R3, True),)
    # a fact found by similarity need not touch where the walker stood: standing on a, the
    # walker fetched b -r2-> c forwards, to c
    assert path_kinds(g, Walker(c, (f_bc,), (a, c))) == (kind(R2),)


def _walkers_at_a_and_after_r1(g):
    a, b = g.entity_index("a"), g.entity_index("b")
    f = int(np.flatnonzero((g.subj == a) & (g.rel == R1))[0])
    return [Walker(a, (), (a,)), Walker(b, (f,), (a, b))]


def test_chain_marks(tiny_graph):
    g = tiny_graph
    params = pol.init_params(16, 8, 3, 3, seed=0, chains=[[kind(R1), kind(R2)]])
    walkers = _walkers_at_a_and_after_r1(g)
    q = np.zeros(16, np.float32)
    cands = [candidates(g, w, q, len(w.fetched), 3, frozenset({g.entity_index("a")}), dense=False)
             for w in walkers]
    batch = pad_candidates(cands)
    assert batch["paths"] == [(), (kind(R1),)]
    slots = np.where(batch["mask"], g.rel[np.maximum(batch["facts"], 0)] * 2 + batch["dirs"], -1)
    on, whole = pol.chain_marks(params, slots, pad_rows(batch["paths"]), batch["mask"])
    # at a: fetching r1 forward begins the chain; r3 does not
    for j in np.flatnonzero(batch["mask"][0]):
        assert on[0, j] == (slots[0, j] == kind(R1))
    # at b after r1: r2 forward completes it; r1 backwards (to a) and r3 leave it
    for j in np.flatnonzero(batch["mask"][1]):
        assert on[1, j] == (slots[1, j] == kind(R2))
    # neither walker has fetched a whole chain yet; the second is midway through one, with a
    # candidate (r2) that goes on along it
    assert whole.tolist() == [[0.0, 0.0], [0.0, 1.0]]
    nowhere = pol.chain_marks(params, slots, pad_rows(batch["paths"]), np.zeros_like(batch["mask"]))
    assert not nowhere[1].any()  # midway with no way on: STOP stays offered
    done = pol.chain_marks(params, slots, pad_rows([(), (kind(R1), kind(R2))]), batch["mask"])[1]
    assert done.tolist() == [[0.0, 0.0], [1.0, 0.0]]
    off = pol.chain_marks(params, slots, pad_rows([(kind(R3),), (kind(R1), kind(R3))]),
                          batch["mask"])[1]
    assert not off.any()  # off every chain: neither whole nor midway
    assert not on[~batch["mask"]].any()  # padding is never marked


def test_chain_marks_are_read_the_same_on_numpy_and_torch(tiny_graph):
    import torch

    g = tiny_graph
    rng = np.random.default_rng(3)
    params = pol.init_params(16, 8, 3, 3, seed=2, chains=[[kind(R1), kind(R2)], [kind(R3)]])
    params["w_chain"] = rng.standard_normal(params["w_chain"].shape).astype(np.float32) * 2
    walkers = _walkers_at_a_and_after_r1(g)
    q = rng.standard_normal(16).astype(np.float32)
    q /= np.linalg.norm(q)
    batch = pad_candidates([candidates(g, w, q, 1, 3, frozenset({g.entity_index("a")}))
                            for w in walkers])
    relmap = np.arange(3)
    n = len(walkers)
    X = np.repeat(pol.question_features(params, q, None)[None], n, 0)
    h = np.zeros((n, 8), np.float32)
    hop = np.ones(n, int)
    lp_np, _ = pol.step(params, pol.NumpyOps, g, relmap, X, h, hop, batch)
    tp = {k: torch.tensor(v) for k, v in params.items()}
    ops = pol.TorchOps()
    lp_t, _ = pol.step(tp, ops, g, relmap, ops.asarray(X), ops.asarray(h), hop, batch)
    assert np.allclose(np.exp(lp_np), np.exp(lp_t.numpy()), atol=1e-6)
    # midway along r1 > r2 with r2 on offer, the second walker cannot stop; the first can
    assert np.exp(lp_np[1, 0]) < 1e-12 and np.exp(lp_np[0, 0]) > 1e-6
    # the marks are read: without chains the probabilities differ
    bare = dict(params, chains=np.zeros((0, 3), np.float32))
    lp_bare, _ = pol.step(bare, pol.NumpyOps, g, relmap, X, h, hop, batch)
    assert not np.allclose(np.exp(lp_np), np.exp(lp_bare), atol=1e-3)
    # a policy that orders the relations otherwise (r2, r1, r3) stores its chains and E rows
    # in its own order; mapped through relmap it is the same policy
    relmap_sw = np.array([1, 0, 2])  # graph relation -> the policy's
    E_sw = params["E"].copy()
    for g_rel, p_rel in enumerate(relmap_sw):
        E_sw[[p_rel * 2, p_rel * 2 + 1]] = params["E"][[g_rel * 2, g_rel * 2 + 1]]
    swapped = dict(params, E=E_sw, chains=pol.chain_table(
        [[kind(relmap_sw[R1]), kind(relmap_sw[R2])], [kind(relmap_sw[R3])]], 3))
    lp_sw, _ = pol.step(swapped, pol.NumpyOps, g, relmap_sw, X, h, hop, batch)
    assert np.allclose(np.exp(lp_sw), np.exp(lp_np), atol=1e-6)


def test_a_policy_stored_before_chains_reads_as_one_without_them(tmp_path):
    import datetime

    import duckdb

    from hopper.store import SCHEMA

    params = pol.init_params(16, 8, 3, 2, seed=1)
    old = {k: v for k, v in params.items() if k not in ("chains", "w_chain")}
    con = duckdb.connect(str(tmp_path / "p.duckdb"))
    con.execute(SCHEMA)
    pol.Policy(old, {"relations": ["x", "y", "z"], "max_hops": 2},
               members=[old]).save(con, 1, datetime.datetime(2026, 1, 1))
    back = pol.Policy.read(con)
    for member in back.members:  # every member gets them, as arrays that change nothing
        assert member["chains"].shape == (0, 2) and not member["w_chain"].any()
        assert member["w_chain"].shape == params["w_chain"].shape


def test_training_finds_the_tiny_stores_chains_and_can_do_without(tmp_path):
    from helpers import TINY, make_tiny_store

    hp, questions = make_tiny_store(tmp_path)
    # who makes part X: made by; where its maker is based: made by, then based in ("stored
    # in" leads to another city for every part, so it answers none)
    summary = hp.train(questions, seed=0, epochs=1, **TINY)
    assert summary["chains"] == ["made by", "made by > based in"]
    assert hp._policy().chain_names() == summary["chains"]
    free = hp.train(questions, seed=0, epochs=1, chains=False, **TINY)
    assert free["chains"] == [] and hp._policy().params["chains"].shape[0] == 0
    # the command line: chains by default, named in the output; --no-chains goes without
    import json

    from helpers import run_cli

    common = ("--questions", questions, "--epochs", "1", "--members", "1", "--store", hp.path)
    rc, out, err = run_cli("train", *common)
    assert rc == 0, err
    assert "walks along 2 relation chains found in the training questions: made by; " \
           "made by > based in" in out
    rc, out, err = run_cli("info", "--store", hp.path)
    assert rc == 0 and ", 2 relation chains" in out, out
    # the audit reads the policy's chains: here every fetch could have stopped
    doc = hp.ask("In which city is the maker of the Kessel part 03 based?")
    fetches = hp.audit(doc["run_id"])["fetches"]
    assert fetches and all(f["stop_offered"] for f in fetches)
    rc, out, err = run_cli("train", *common, "--no-chains", "--json")
    assert rc == 0, err
    assert json.loads(out)["chains"] == []


def test_audit_says_where_stop_was_not_offered():
    from hopper.audit import format_run
    from hopper.policy import mark_stops

    def fetch(hop, relation, direction="forward"):
        return {"hop": hop, "fact_id": hop, "relation": relation, "direction": direction,
                "text": f"fact {hop}", "probability": 0.9, "from": "x", "to": "y",
                "alternatives": []}

    chains = ["made by", "made by > managed by > reports to", "contains part (reversed) > made by"]
    run = [fetch(1, "made by"), fetch(2, "managed by"), fetch(3, "reports to")]
    mark_stops(run, chains)
    # after "made by" (a whole chain) the walk could stop; after "made by > managed by" not
    assert [f["stop_offered"] for f in run] == [True, True, False]
    assert run[2]["midway_along"] == ["made by > managed by > reports to"]
    back = [fetch(1, "contains part", "inverse"), fetch(2, "made by")]
    mark_stops(back, chains)
    assert [f["stop_offered"] for f in back] == [True, False]
    off = [fetch(1, "made by"), fetch(2, "based in"), fetch(3, "located in")]
    mark_stops(off, chains)
    assert all(f["stop_offered"] for f in off)  # off every chain: nothing was withheld
    text = format_run({"run_id": "r", "question": "q", "answer": "a", "confidence": 0.9,
                       "strategy": "policy", "policy_version": 1, "fetches": run})
    assert "STOP not offered: midway along made by > managed by > reports to" in text
