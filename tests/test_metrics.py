"""Filtered ranking metrics against hand-worked values and against scikit-learn."""
from __future__ import annotations

import numpy as np
import pytest

from hopper.metrics import filtered_rank, known_answers, ranking_metrics

# A hand-worked example (common practice: the filtered setting of link prediction).  Six
# candidate entities a..f; a beam search scored four of them, e and f got no score.
SCORES = {"a": 0.9, "b": 0.7, "c": 0.7, "d": 0.2}
N = 6


def test_filtered_rank_hand_worked():
    # gold c, a is another known answer of the same query: a is removed, c ties with b.
    assert filtered_rank(SCORES, "c", {"a", "c"}, N) == 1.5
    assert filtered_rank(SCORES, "c", {"a", "c"}, N, ties="pessimistic") == 2
    assert filtered_rank(SCORES, "c", {"a", "c"}, N, ties="optimistic") == 1
    # the same without filtering: a is above c
    assert filtered_rank(SCORES, "c", set(), N) == 2.5
    # gold a, with c also true: nothing above a
    assert filtered_rank(SCORES, "a", {"a", "c"}, N) == 1
    # gold d, with a and c also true: only b is left above d
    assert filtered_rank(SCORES, "d", {"a", "c", "d"}, N) == 2
    # gold e, unscored: after the 4 scored, tied with f -> 4 + 1 + 1/2
    assert filtered_rank(SCORES, "e", {"e"}, N) == 5.5
    assert filtered_rank(SCORES, "e", {"e"}, N, ties="pessimistic") == 6
    assert filtered_rank(SCORES, "e", {"e"}, N, ties="optimistic") == 5
    # gold e, f also true (and unscored): f is filtered, e is alone after the scored
    assert filtered_rank(SCORES, "e", {"e", "f"}, N) == 5
    # filtering a scored answer moves an unscored gold up by one
    assert filtered_rank(SCORES, "e", {"e", "a"}, N) == 4.5
    # without n_entities an unscored gold ranks right after the scored ones
    assert filtered_rank(SCORES, "e", set()) == 5


def test_ranking_metrics_hand_worked():
    m = ranking_metrics([1.5, 1, 2, 5.5])
    assert m["n"] == 4
    assert m["hits1"] == pytest.approx(1 / 4)      # only the rank 1
    assert m["hits3"] == pytest.approx(3 / 4)      # 1.5, 1 and 2
    assert m["hits10"] == pytest.approx(1.0)
    # MRR = (1/1.5 + 1 + 1/2 + 1/5.5) / 4 = (0.666667 + 1 + 0.5 + 0.181818) / 4
    assert m["mrr"] == pytest.approx(0.587121, abs=1e-6)
    assert ranking_metrics([])["n"] == 0
    with pytest.raises(ValueError):
        ranking_metrics([0])


def test_bad_inputs():
    with pytest.raises(ValueError):
        filtered_rank(SCORES, "a", (), N, ties="random")
    with pytest.raises(ValueError):
        filtered_rank(SCORES, "a", (), n_entities=2)


def test_known_answers_with_inverse():
    idx = known_answers([("x", "r", "a"), ("x", "r", "c"), ("y", "r", "a")],
                        inverse=lambda r: r + "_inv")
    assert idx[("x", "r")] == {"a", "c"}
    assert idx[("a", "r_inv")] == {"x", "y"}
    assert idx[("c", "r_inv")] == {"x"}


def _filtered_matrix(scores, gold, known):
    """The filtered setting as a score matrix for scikit-learn: known-true columns other than
    the gold one are pushed below every other score, so they cannot rank above the gold."""
    s = scores.astype(float).copy()
    low = s.min() - 1.0
    for i, (g, k) in enumerate(zip(gold, known)):
        for j in k:
            if j != g:
                s[i, j] = low
    y = np.zeros_like(s, dtype=int)
    y[np.arange(len(gold)), gold] = 1
    return y, s


@pytest.mark.parametrize("integer_scores", [False, True])
def test_mrr_matches_scikit_learn(integer_scores):
    """scikit-learn (the general-purpose reference): label_ranking_average_precision_score
    equals MRR when each query has exactly one relevant label.  It counts every label scored
    at least as high as the relevant one, i.e. pessimistic ties; without ties all three tie
    rules agree."""
    from sklearn.metrics import label_ranking_average_precision_score

    rng = np.random.default_rng(0)
    Q, E = 200, 30
    scores = rng.integers(0, 6, (Q, E)) if integer_scores else rng.random((Q, E))
    gold = rng.integers(0, E, Q)
    known = [set(rng.choice(E, rng.integers(0, 5), replace=False).tolist()) | {int(g)}
             for g in gold]
    ranks = {t: [filtered_rank(dict(enumerate(scores[i])), int(gold[i]), known[i], E, ties=t)
                 for i in range(Q)] for t in ("pessimistic", "mean", "optimistic")}
    y, s = _filtered_matrix(scores, gold, known)
    lrap = label_ranking_average_precision_score(y, s)
    assert ranking_metrics(ranks["pessimistic"])["mrr"] == pytest.approx(lrap, abs=1e-12)
    if not integer_scores:
        assert ranks["mean"] == ranks["pessimistic"] == ranks["optimistic"]
    else:
        assert all(p >= m >= o for p, m, o in zip(*ranks.values()))


def test_unscored_match_scikit_learn_with_lowest_scores():
    """Unscored entities behave as if scored below everything (scikit-learn, pessimistic)."""
    from sklearn.metrics import label_ranking_average_precision_score

    rng = np.random.default_rng(1)
    Q, E = 100, 20
    full = rng.random((Q, E))
    gold = rng.integers(0, E, Q)
    ranks = []
    mat = full.copy()
    for i in range(Q):
        scored = rng.random(E) < 0.5
        mat[i, ~scored] = -1.0
        d = {j: full[i, j] for j in range(E) if scored[j]}
        ranks.append(filtered_rank(d, int(gold[i]), {int(gold[i])}, E, ties="pessimistic"))
    y = np.zeros((Q, E), int)
    y[np.arange(Q), gold] = 1
    assert ranking_metrics(ranks)["mrr"] == pytest.approx(
        label_ranking_average_precision_score(y, mat), abs=1e-12)
