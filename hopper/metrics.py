"""Filtered ranking metrics for completion questions: the gold answer's rank, Hits@k and MRR."""
from __future__ import annotations

import math
from collections import defaultdict
from collections.abc import Hashable, Iterable, Mapping

TIES = ("mean", "pessimistic", "optimistic")


def filtered_rank(scores: Mapping[Hashable, float], gold: Hashable, known_true: Iterable = (),
                  n_entities: int | None = None, ties: str = "mean") -> float:
    """The rank (1 = best) of ``gold`` among the candidate answers, in the filtered setting.

    ``scores`` maps candidate entities to scores (higher is better).  ``known_true`` are the
    answers known true for the same (subject, relation) query (from train, valid and test): all
    of them except ``gold`` itself are removed before ranking, so a model is not penalised for
    ranking another right answer first (the standard filtered setting of link prediction).

    Ties: with ``ties="mean"`` (the default) the gold answer takes the mean of the positions it
    shares with the equally scored candidates, ``1 + higher + equal / 2``; ``"pessimistic"``
    puts it after all of them (``1 + higher + equal``), ``"optimistic"`` before them.

    Entities without a score (``n_entities`` counts every candidate, scored or not) rank after
    every scored one, tied with one another: an unscored gold answer gets
    ``scored + 1 + unscored / 2`` under mean ties (``scored + 1 + unscored`` pessimistic,
    ``scored + 1`` optimistic), where ``scored`` and ``unscored`` count the *other* candidates
    left after filtering.  Without ``n_entities`` nothing is known of the unscored ones, and
    an unscored gold answer ranks right after the scored ones (``scored + 1``).
    """
    if ties not in TIES:
        raise ValueError(f"ties must be one of {', '.join(TIES)} (got {ties!r})")
    removed = set(known_true)
    removed.discard(gold)
    others = [s for e, s in scores.items() if e != gold and e not in removed]
    for s in others:
        if isinstance(s, float) and math.isnan(s):
            raise ValueError("a score is NaN")
    unscored = 0
    if n_entities is not None:
        filtered_unscored = sum(1 for e in removed if e not in scores)
        scored_others = sum(1 for e in scores if e != gold)  # filtered ones included
        unscored = n_entities - 1 - scored_others - filtered_unscored
        if unscored < 0:
            raise ValueError("n_entities is smaller than the candidates named by the scores")
    if gold in scores:
        g = scores[gold]
        higher = sum(1 for s in others if s > g)
        equal = sum(1 for s in others if s == g)
    else:
        higher, equal = len(others), unscored
    if ties == "mean":
        return 1 + higher + equal / 2
    if ties == "pessimistic":
        return float(1 + higher + equal)
    return float(1 + higher)


def ranking_metrics(ranks: Iterable[float]) -> dict:
    """Hits@1, Hits@3, Hits@10 (share of ranks <= k) and MRR (mean of 1 / rank), with n."""
    ranks = [float(r) for r in ranks]
    if any(r < 1 for r in ranks):
        raise ValueError("ranks start at 1")
    n = len(ranks)
    if n == 0:
        return {"hits1": 0.0, "hits3": 0.0, "hits10": 0.0, "mrr": 0.0, "n": 0}
    return {"hits1": sum(r <= 1 for r in ranks) / n, "hits3": sum(r <= 3 for r in ranks) / n,
            "hits10": sum(r <= 10 for r in ranks) / n, "mrr": sum(1 / r for r in ranks) / n,
            "n": n}


def known_answers(triples: Iterable[tuple], inverse=None) -> dict:
    """{(subject, relation): {objects}} over all given triples, for the filtered setting.

    With ``inverse`` (a function relation -> the name of its inverse), head queries are
    indexed too: ``(object, inverse(relation)) -> {subjects}``.
    """
    out: dict = defaultdict(set)
    for s, r, o in triples:
        out[(s, r)].add(o)
        if inverse is not None:
            out[(o, inverse(r))].add(s)
    return dict(out)
