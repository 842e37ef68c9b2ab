"""The policy's one forward pass gives the same probabilities on numpy (ask) and torch (train)."""
from __future__ import annotations

import numpy as np

from hopper import policy as pol
from hopper.env import Walker, candidates, pad_candidates


def _batch(graph, qvec):
    starts = [graph.entity_index("a"), graph.entity_index("b")]
    walkers = [Walker(s, (), (s,)) for s in starts]
    cands = [candidates(graph, w, qvec, 0, 3, frozenset(starts)) for w in walkers]
    return pad_candidates(cands), len(walkers)


def test_numpy_and_torch_give_the_same_probabilities(tiny_graph):
    import torch
    rng = np.random.default_rng(0)
    q = rng.standard_normal(16).astype(np.float32)
    q /= np.linalg.norm(q)
    params = pol.init_params(16, 8, len(tiny_graph.relation_names), 3, seed=5)
    batch, n = _batch(tiny_graph, q)
    relmap = np.arange(len(tiny_graph.relation_names))
    Q = np.repeat(q[None], n, 0)
    h = rng.standard_normal((n, 8)).astype(np.float32) * 0.1
    lp_np, c_np = pol.step(params, pol.NumpyOps, tiny_graph, relmap, Q, h, np.zeros(n, int), batch)
    tp = {k: torch.tensor(v) for k, v in params.items()}
    ops = pol.TorchOps()
    lp_t, c_t = pol.step(tp, ops, tiny_graph, relmap, ops.asarray(Q), ops.asarray(h),
                         np.zeros(n, int), batch)
    assert np.allclose(np.exp(lp_np), np.exp(lp_t.numpy()), atol=1e-6)
    m_np = pol.next_memory(params, pol.NumpyOps, h, c_np[:, 0])
    m_t = pol.next_memory(tp, ops, ops.asarray(h), c_t[:, 0])
    assert np.allclose(m_np, m_t.numpy(), atol=1e-6)
    # probabilities sum to one over STOP and the real candidates; padding gets none
    p = np.exp(lp_np)
    assert np.allclose(p.sum(1), 1.0, atol=1e-6)
    assert np.all(p[:, 1:][~batch["mask"]] < 1e-12)


def test_entity_vectors_same_on_numpy_and_torch_and_change_the_scores(tiny_graph):
    import torch
    rng = np.random.default_rng(1)
    q = rng.standard_normal(16).astype(np.float32)
    q /= np.linalg.norm(q)
    n_ent = len(tiny_graph.entity_names)
    params = pol.init_params(16, 8, len(tiny_graph.relation_names), 3, seed=5, n_entities=n_ent)
    assert params["N_c"].shape == (n_ent + 1, 8) and not params["N_c"].any()  # zero at the start
    params["N_c"] = rng.standard_normal(params["N_c"].shape).astype(np.float32)
    params["N_z"] = rng.standard_normal(params["N_z"].shape).astype(np.float32)
    params["N_s"] = rng.standard_normal(params["N_s"].shape).astype(np.float32)
    batch, n = _batch(tiny_graph, q)
    relmap = np.arange(len(tiny_graph.relation_names))
    entmap = np.arange(n_ent)
    Q, h = np.repeat(q[None], n, 0), np.zeros((n, 8), np.float32)
    lp_np, _ = pol.step(params, pol.NumpyOps, tiny_graph, relmap, Q, h, np.zeros(n, int), batch,
                        entmap=entmap, start=batch["here"])
    tp = {k: torch.tensor(v) for k, v in params.items()}
    ops = pol.TorchOps()
    lp_t, _ = pol.step(tp, ops, tiny_graph, relmap, ops.asarray(Q), ops.asarray(h),
                       np.zeros(n, int), batch, entmap=entmap, start=batch["here"])
    assert np.allclose(np.exp(lp_np), np.exp(lp_t.numpy()), atol=1e-6)
    shared, _ = pol.step(params, pol.NumpyOps, tiny_graph, relmap, Q, h, np.zeros(n, int), batch)
    assert not np.allclose(np.exp(lp_np), np.exp(shared), atol=1e-3)  # the vectors are read
    # a policy maps entities by name; names it never saw share the last row
    policy = pol.Policy(params, {"entities": ["b", "a"]})
    m = policy.entity_map(["a", "b", "zz"])
    assert m.tolist() == [1, 0, 2]
    assert pol.Policy(params, {}).entity_map(["a"]) is None


def test_policy_round_trips_through_the_store_without_pickle(tmp_path):
    import duckdb

    from hopper.store import SCHEMA

    params = pol.init_params(16, 8, 3, 2, seed=1)
    p = pol.Policy(params, {"relations": ["x", "y", "z"], "max_hops": 2, "threshold": 0.3})
    con = duckdb.connect(str(tmp_path / "p.duckdb"))
    con.execute(SCHEMA)
    import datetime
    p.save(con, 1, datetime.datetime(2026, 1, 1))
    back = pol.Policy.read(con)
    assert back.version == 1 and back.settings["relations"] == ["x", "y", "z"]
    for k, v in params.items():
        assert np.array_equal(back.params[k], v)
    blob_types = {r[0] for r in con.execute("SELECT DISTINCT dtype FROM policy_tensors").fetchall()}
    assert blob_types == {"float32-le"}


def test_unknown_relations_share_one_row():
    slots = pol.relation_slot(np.array([0, 1, -1, 7]), np.array([0, 1, 0, 1]), n_relations=3)
    assert list(slots) == [0, 3, 6, 6]


def test_word_bag_counts_training_words_and_shares_unseen_ones():
    # Invented unit vectors (common practice): a training word counts 1 for itself; a word
    # never seen in training counts for the training word it is nearest to; a word near none
    # of them (cosine below WORD_NULL) counts for nothing.
    e = np.eye(4, dtype=np.float32)
    P = {"w_vocab": e[:2]}
    assert np.allclose(pol.word_bag(P, e[:1]), [1.0, 0.0], atol=1e-4)  # exp(-10) goes to "none"
    near = (0.9 * e[1] + 0.1 * e[2])
    near /= np.linalg.norm(near)
    assert np.allclose(pol.word_bag(P, near[None]), [0.0, 1.0], atol=1e-3)
    assert pol.word_bag(P, e[3:4]).sum() < 1e-3
    assert np.allclose(pol.word_bag(P, np.stack([e[0], e[0], e[1]])), [2.0, 1.0], atol=1e-3)


def test_word_basis_keeps_words_seen_twice_and_scales_their_counts():
    e = np.eye(5, dtype=np.float32)
    lists = [("who", "makes"), ("who", "certified"), ("where", "makes")]
    vecs = [np.stack([e[0], e[1]]), np.stack([e[0], e[2]]), np.stack([e[3], e[1]])]
    vocab, mean, scale, words = pol.word_basis(lists, vecs)
    assert words == ["makes", "who"]           # by count, then alphabetically
    assert np.allclose(vocab, np.stack([e[1], e[0]]))
    assert np.allclose(mean, [2 / 3, 2 / 3], atol=1e-4)
    x = pol.question_features({"q_mean": np.zeros(5, np.float32),
                               "q_proj": np.zeros((5, 0), np.float32),
                               "w_vocab": vocab, "w_mean": mean, "w_scale": scale},
                              np.zeros(5, np.float32), vecs[0])
    assert np.allclose(x, (np.array([1.0, 1.0]) - mean) * scale, atol=1e-3)


def test_stated_answers_change_scores_alike_on_numpy_and_torch(tiny_graph):
    """w_known reads which candidates lead to (and whether the walker stands on) an answer a
    visible fact already states; numpy and torch agree, and without stated answers it is unread."""
    import torch
    rng = np.random.default_rng(2)
    q = rng.standard_normal(16).astype(np.float32)
    q /= np.linalg.norm(q)
    params = pol.init_params(16, 8, len(tiny_graph.relation_names), 3, seed=5)
    assert params["w_known"].shape == (4, 2) and not params["w_known"].any()  # per hop
    params["w_known"][0] = [-3.0, 2.0]  # (the batch is at hop 0)
    batch, n = _batch(tiny_graph, q)
    relmap = np.arange(len(tiny_graph.relation_names))
    Q, h = np.repeat(q[None], n, 0), np.zeros((n, 8), np.float32)
    stated = [frozenset({tiny_graph.entity_index("b")}), frozenset({tiny_graph.entity_index("b")})]
    lp_np, _ = pol.step(params, pol.NumpyOps, tiny_graph, relmap, Q, h, np.zeros(n, int), batch,
                        stated=stated)
    tp = {k: torch.tensor(v) for k, v in params.items()}
    ops = pol.TorchOps()
    lp_t, _ = pol.step(tp, ops, tiny_graph, relmap, ops.asarray(Q), ops.asarray(h),
                       np.zeros(n, int), batch, stated=stated)
    assert np.allclose(np.exp(lp_np), np.exp(lp_t.numpy()), atol=1e-6)
    plain, _ = pol.step(params, pol.NumpyOps, tiny_graph, relmap, Q, h, np.zeros(n, int), batch)
    # walker 0 stands on a: its fact to b loses mass; walker 1 stands on b: STOP gains
    j = 1 + int(np.flatnonzero(batch["facts"][0] == 0)[0])  # fact 0 is a -r1-> b
    assert np.isclose(lp_np[0, j] - lp_np[0, 0], plain[0, j] - plain[0, 0] - 3.0, atol=1e-5)
    assert np.isclose(lp_np[1, 0] - lp_np[1, 1], plain[1, 0] - plain[1, 1] + 2.0, atol=1e-5)
    empty, _ = pol.step(params, pol.NumpyOps, tiny_graph, relmap, Q, h, np.zeros(n, int), batch,
                        stated=[frozenset(), frozenset()])
    assert np.allclose(empty, plain)


def test_candidates_of_a_batch_are_each_walkers_own(tiny_graph):
    """candidates_batch (beam search, many walkers and questions) gives every walker the
    facts and features that candidates() gives it alone."""
    from hopper.env import candidates_batch

    g = tiny_graph
    rng = np.random.default_rng(1)
    qs = rng.standard_normal((2, 16)).astype(np.float32)
    qs /= np.linalg.norm(qs, axis=1, keepdims=True)
    a, b, d = g.entity_index("a"), g.entity_index("b"), g.entity_index("d")
    f_ab = int(np.flatnonzero((g.subj == a) & (g.obj == b))[0])
    # walker 2 stands where walker 0 does, but its question hides the fact a -> b
    walkers = [Walker(a, (), (a,)), Walker(b, (f_ab,), (a, b)), Walker(a, (), (a,)),
               Walker(d, (), (d,))]
    owner = [0, 0, 1, 1]
    linked = [frozenset([a]), frozenset([a]), frozenset([a]), frozenset([d])]
    hidden = [frozenset(), frozenset(), frozenset([f_ab]), frozenset()]
    for hop in (0, 1):
        batch = candidates_batch(g, walkers, qs[owner], hop, 3, linked, hidden, [{}, {}, {}, {}],
                                 cap=2)
        for i, w in enumerate(walkers):
            c = candidates(g, w, qs[owner[i]], hop, 3, linked[i], hidden[i], cap=2)
            n = len(c.facts)
            assert batch["counts"][i] == n and batch["mask"][i].sum() == n
            assert (batch["facts"][i, :n] == c.facts).all() and (batch["nexts"][i, :n] == c.nexts).all()
            assert np.allclose(batch["feats"][i, :n], c.feats, atol=1e-6)
            assert np.allclose(batch["stop_feats"][i], c.stop_feats, atol=1e-6)
            if i in (1, 2):  # fetched (walker 1) or hidden (walker 2): not offered
                assert f_ab not in set(c.facts.tolist())
        assert f_ab in set(batch["facts"][0].tolist())  # walker 0, same place, sees it


def test_a_policy_read_before_is_not_read_again():
    """Warm asks in one process keep the policy they read; a new version or another store's
    policy of the same number is read afresh."""
    import datetime

    import duckdb

    from hopper.store import SCHEMA

    def store():
        con = duckdb.connect(":memory:")
        con.execute(SCHEMA)
        return con

    now = datetime.datetime(2026, 1, 1)
    params = pol.init_params(16, 8, 2, 3, seed=0)
    con, known = store(), {}
    pol.Policy(params, {"train_run": "a"}).save(con, 1, now)
    first = pol.Policy.read(con, known=known)
    assert pol.Policy.read(con, known=known) is first
    pol.Policy(params, {"train_run": "b"}).save(con, 2, now)
    second = pol.Policy.read(con, known=known)
    assert second.version == 2 and second is not first
    assert pol.Policy.read(con, 1, known=known) is first
    other = store()
    pol.Policy(params, {"train_run": "c"}).save(other, 1, now)
    assert pol.Policy.read(other, known=known).settings["train_run"] == "c"
