"""The one-hop ComplEx scorer (hopper.scorer): its scores, probabilities and N3 regulariser
against formulas written here with numpy's complex numbers, and a fit of a small pattern."""
from __future__ import annotations

import numpy as np
import pytest

from hopper.scorer import Scorer, fit_scorer, n3_penalty


def _complex(rows: np.ndarray) -> np.ndarray:
    k = rows.shape[1] // 2
    return rows[:, :k].astype(np.float64) + 1j * rows[:, k:].astype(np.float64)


def test_probabilities_are_sigmoid_or_softmax_of_the_complex_score():
    """score(s, r, o) = Re(<e_s, w_r, conj(e_o)>) (Trouillon et al., ICML 2016, eq. 6, from
    memory); a scorer fitted with BCE gives sigmoid(score) per entity, one fitted with the
    softmax loss the softmax of the scores over all entities.  probs_of gives the same numbers
    for a few answers."""
    rng = np.random.default_rng(0)
    ent, rel = rng.normal(size=(6, 8)), rng.normal(size=(3, 8))
    e, w = _complex(ent), _complex(rel)
    starts, rels = np.array([0, 4, 5]), np.array([2, 0, 1])
    score = np.real((e[starts] * w[rels]) @ np.conj(e).T)
    sigmoid = 1 / (1 + np.exp(-score))
    softmax = np.exp(score) / np.exp(score).sum(1, keepdims=True)
    for loss, want in (("bce", sigmoid), ("softmax", softmax)):
        scorer = Scorer(ent, rel, loss)
        assert np.allclose(scorer.logits(starts, rels), score, atol=1e-4)
        assert np.allclose(scorer.probs(starts, rels), want, atol=1e-5)
        assert np.allclose(scorer.probs_of(4, 0, [1, 3, 5]), want[1, [1, 3, 5]], atol=1e-5)
    assert np.allclose(Scorer(ent, rel, "softmax").probs(starts, rels).sum(1), 1.0, atol=1e-5)


def test_n3_penalty_is_the_papers_nuclear_3_norm():
    """N3 of Lacroix, Usunier & Obozinski (ICML 2018, from memory): for a batch of B triples,
    (1 / B) * sum over triples and complex coordinates i of |e_s,i|^3 + |w_r,i|^3 + |e_o,i|^3,
    |.| the modulus.  numpy and torch inputs give the same number."""
    import torch

    rng = np.random.default_rng(1)
    s, r, o = (rng.normal(size=(5, 6)) for _ in range(3))
    want = sum((np.abs(_complex(x)) ** 3).sum() for x in (s, r, o)) / 5
    assert n3_penalty(s, r, o, 3) == pytest.approx(want, rel=1e-12)
    got = n3_penalty(*(torch.tensor(x) for x in (s, r, o)), 3)
    assert float(got) == pytest.approx(want, rel=1e-12)


@pytest.mark.parametrize("loss, options", [("bce", dict(smoothing=0.0)),
                                           ("softmax", dict(smoothing=0.0, n3=0.01))])
def test_fit_learns_a_one_hop_pattern(loss, options):
    """Relation 0 maps entity i to i + 1 (mod 8), relation 1 back: after fitting with either
    loss each start's answer is ranked first of the 8 with a probability above 0.5."""
    n = 8
    queries = [(i, 0, {(i + 1) % n}) for i in range(n)] + [(i, 1, {(i - 1) % n}) for i in range(n)]
    scorer = fit_scorer(queries, n, 2, epochs=300, dim=8, dropout=0.0, batch=16, lr=0.01,
                        loss=loss, seed=0, **options)
    assert scorer.loss == loss
    p = scorer.probs(np.arange(n), np.zeros(n, int))
    assert p.shape == (n, n) and np.all((p >= 0) & (p <= 1))
    assert all(int(np.argmax(p[i])) == (i + 1) % n for i in range(n))
    assert all(p[i, (i + 1) % n] > 0.5 for i in range(n))


def test_fit_rejects_an_unknown_loss():
    with pytest.raises(ValueError, match="loss"):
        fit_scorer([(0, 0, {1})], 2, 1, loss="hinge")
