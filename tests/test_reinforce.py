"""The REINFORCE update against exact gradients and hand-worked returns."""
from __future__ import annotations

import numpy as np
import pytest

torch = pytest.importorskip("torch")

from hopper import policy as pol  # noqa: E402
from hopper import train as tr  # noqa: E402
from hopper.env import Walker, candidates, pad_candidates  # noqa: E402


def test_reward_to_go_worked_example():
    # Worked by hand (common practice): rewards [-0.1, -0.1, 1.0] -> G = [0.8, 0.9, 1.0].
    g = tr.reward_to_go(np.array([[-0.1, -0.1, 1.0]]))
    assert np.allclose(g, [[0.8, 0.9, 1.0]])


def test_leave_one_out_baseline_worked_example():
    # Worked by hand (common practice): K = 3 rollouts with returns 1, 0, 0.5 at hop 0; the
    # baseline of each is the mean of the other two: 0.25, 0.75, 0.5.  At hop 1 only the first
    # two walk on, so each one's baseline is the other's return; alone, the baseline is 0.
    G = np.array([[[1.0, 2.0], [0.0, 4.0], [0.5, 0.0]]])
    active = np.array([[[1, 1], [1, 1], [1, 0]]], float)
    b = tr.loo_baseline(G, active)
    assert np.allclose(b[0, :, 0], [0.25, 0.75, 0.5])
    assert np.allclose(b[0, :2, 1], [4.0, 2.0])


def _exact_expected_reward(P, graph, ep, T, cost):
    """J = sum over every fetch sequence of P(sequence) * R(sequence), differentiable in P."""
    ops = pol.TorchOps()
    relmap = np.arange(len(graph.relation_names))
    fixed = {k: P[k].detach().numpy() for k in pol.FIXED}
    q = ops.asarray(pol.question_features(fixed, ep.qstate, ep.word_vecs)[None, :])

    def walk(walker, h, t, logp, fetched):
        reward = lambda: float(walker.entity in ep.gold) - cost * fetched  # noqa: E731
        if t == T:
            return torch.exp(logp) * reward()
        c = candidates(graph, walker, ep.qvec, t, T, frozenset(ep.starts), ep.hidden)
        batch = pad_candidates([c])
        lp, crepr = pol.step(P, ops, graph, relmap, q, h, np.array([t]), batch)
        total = torch.exp(logp + lp[0, 0]) * reward()  # STOP here
        for j in range(len(c.facts)):
            w = Walker(int(c.nexts[j]), walker.fetched + (int(c.facts[j]),),
                       walker.visited + (int(c.nexts[j]),))
            h2 = pol.next_memory(P, ops, h, crepr[:, j])
            total = total + walk(w, h2, t + 1, logp + lp[0, 1 + j], fetched + 1)
        return total

    H = P["W_h"].shape[0]
    return walk(Walker(ep.starts[0], (), (ep.starts[0],)), torch.zeros(1, H), 0,
                torch.zeros(()), 0)


def test_reinforce_gradient_matches_exact_gradient(tiny_graph):
    """Score-function identity, Williams (1992), 'Simple statistical gradient-following
    algorithms for connectionist reinforcement learning', Machine Learning 8: the expectation
    of sum_t (G_t - b_t) grad log pi(a_t|s_t) equals grad E[R].  We enumerate every fetch
    sequence of a tiny store for the exact gradient and compare the Monte Carlo estimate
    produced by hopper's own rollout and loss, within its standard error."""
    g = tiny_graph
    T, cost, K = 2, 0.05, 8
    rng = np.random.default_rng(1)
    q = rng.standard_normal(16).astype(np.float32)
    q /= np.linalg.norm(q)
    ep = tr.Episode(q, q, [g.entity_index("a")], frozenset([g.entity_index("c")]))
    init = pol.init_params(16, 8, len(g.relation_names), T, seed=3)
    P = {k: torch.tensor(v, dtype=torch.float64, requires_grad=k not in pol.FIXED)
         for k, v in init.items()}
    learned = [v for k, v in P.items() if k not in pol.FIXED]
    torch.set_default_dtype(torch.float64)
    try:
        J = _exact_expected_reward(P, g, ep, T, cost)
        exact = torch.autograd.grad(J, learned, allow_unused=True)  # w_known: no stated answers
        exact = torch.cat([(e if e is not None else torch.zeros_like(p)).reshape(-1)
                           for e, p in zip(exact, learned)]).numpy()
        assert -cost * T <= float(J.detach()) <= 1.0
        ops = pol.TorchOps()
        gen = torch.Generator().manual_seed(0)
        estimates = []
        for _ in range(40):
            out = tr.rollout(P, ops, g, np.arange(len(g.relation_names)), [ep] * 64, K, T,
                             0.0, gen, rng)
            logp, ent, correct, active, final, fetches, last = out
            rewards = tr.episode_rewards(correct, active, fetches, last, cost)
            loss = tr.reinforce_loss(logp, ent, rewards, active, K, entropy_weight=0.0)
            grads = torch.autograd.grad(-loss, learned, allow_unused=True)
            estimates.append(torch.cat([
                (gr if gr is not None else torch.zeros_like(p)).reshape(-1)
                for gr, p in zip(grads, learned)]).numpy())
    finally:
        torch.set_default_dtype(torch.float32)
    est = np.array(estimates)
    mean, se = est.mean(0), est.std(0, ddof=1) / np.sqrt(len(est))
    # every component within 4 standard errors (plus a hair for components that are ~0)
    assert np.all(np.abs(mean - exact) <= 4 * se + 1e-3), np.max(np.abs(mean - exact) - 4 * se)
    cos = mean @ exact / (np.linalg.norm(mean) * np.linalg.norm(exact))
    assert cos > 0.97, cos


def test_sentence_dropout_hides_only_the_sentence_view_of_about_p_of_the_questions():
    # Common practice (input dropout): with p = 0.5 about half the questions lose their first
    # k features (the sentence view) and keep the rest (the word bag); the inputs stay as they were.
    rng = np.random.default_rng(0)
    eps = [object() for _ in range(400)]
    qx = {id(e): np.arange(1.0, 7.0, dtype=np.float32) for e in eps}
    out = tr._drop_sentence(qx, eps, 4, 0.5, rng)
    hidden = [np.all(out[id(e)][:4] == 0) for e in eps]
    assert 0.42 < np.mean(hidden) < 0.58
    for e, h in zip(eps, hidden):
        assert np.array_equal(out[id(e)][4:], [5.0, 6.0])
        assert h or np.array_equal(out[id(e)], qx[id(e)])
        assert np.array_equal(qx[id(e)], np.arange(1.0, 7.0))
    assert tr._drop_sentence(qx, eps, 4, 0.0, rng) is qx
