"""Search: beam search over fetch sequences with the learned policy, and the two untrained baselines."""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from . import policy as pol
from .env import Episode, Graph, Walker, candidates, pad_candidates

N_ALTERNATIVES = 5   # facts passed over, recorded per hop
BEAM = 16
SIM_TEMPERATURE = 0.05  # turns the baselines' cosine similarities into reported probabilities


@dataclass
class Fetch:
    """One hop of an answer's fetch sequence."""

    hop: int
    fact: int                 # fact row in the graph
    direction: int            # 0 forward, 1 inverse
    probability: float
    from_entity: int
    to_entity: int
    alternatives: list = field(default_factory=list)  # [(fact row or None for STOP, probability)]


@dataclass
class Outcome:
    """What a strategy found for one question (graph indices; the API turns it into names)."""

    ranked: list                # [(entity row, score)], best first
    fetches: list               # [Fetch] behind the top answer
    starts: list                # entities linked from the question
    confidence: float = 0.0
    abstained: bool = False
    reason: str | None = None
    n_fetches: float = 0.0      # fetches behind the answer


@dataclass
class _Beam:
    walker: Walker
    h: np.ndarray
    logp: float
    steps: tuple = ()


def _alternatives(probs: np.ndarray, facts: np.ndarray, chosen: int, order=None) -> list:
    """The best options passed over at one hop: index 0 is STOP, index j > 0 is facts[j - 1].

    ``order``: ``probs`` sorted best first, when the caller has it already.
    """
    if order is None:
        order = np.argsort(-probs, kind="stable")
    out = []
    for j in order:
        if j == chosen or (j > 0 and facts[j - 1] < 0):
            continue
        out.append((None if j == 0 else int(facts[j - 1]), float(probs[j])))
        if len(out) == N_ALTERNATIVES:
            break
    return out


def _finish(ranked_scores: dict, best_path: dict, starts: list) -> Outcome:
    ranked = sorted(ranked_scores.items(), key=lambda kv: (-kv[1], kv[0]))
    total = sum(ranked_scores.values())
    if not ranked:
        return Outcome([], [], starts, 0.0, True, "no walk reached an answer")
    top = ranked[0][0]
    conf = ranked[0][1] / total if total > 0 else 0.0
    path = best_path[top]
    return Outcome(ranked, list(path), starts, conf, False, None, float(len(path)))


def beam_search(graph: Graph, policy: pol.Policy, ep: Episode, beam: int = BEAM,
                max_hops: int | None = None, relmap: np.ndarray | None = None) -> Outcome:
    """Beam search over fetch sequences; an answer's score sums the beams that end on it."""
    qvec, starts, hidden, qrel = ep.qvec, ep.starts, ep.hidden, ep.qrel
    if not starts:
        return Outcome([], [], starts, 0.0, True, "no entity of the store is named in the question")
    P = policy.params
    ops = pol.NumpyOps
    T = min(max_hops or policy.max_hops, policy.max_hops)
    relmap = policy.relation_map(graph.relation_names) if relmap is None else relmap
    entmap = _entity_map(policy, graph)
    linked = frozenset(starts)
    H = P["W_h"].shape[0]
    x = pol.question_features(P, ep.qstate, ep.word_vecs)
    live = [_Beam(Walker(s, (), (s,)), np.zeros(H, np.float32), -math.log(len(starts)))
            for s in starts]
    finished: list[_Beam] = []
    cache: dict = {}  # pre-ranked neighbours and dense results, shared by this question's beams
    for t in range(T):
        if not live:
            break
        cap = int(policy.settings.get("adj_cap", 32))
        cands = [candidates(graph, b.walker, qvec, t, T, linked, hidden, prerank_cache=cache,
                            cap=cap) for b in live]
        batch = pad_candidates(cands)
        n = len(live)
        logp, crepr = pol.step(P, ops, graph, relmap, np.repeat(x[None, :], n, 0),
                               np.stack([b.h for b in live]), np.full(n, t), batch,
                               qrel=np.full(n, relmap[qrel] if qrel >= 0 else -1), entmap=entmap,
                               start=[b.walker.visited[0] for b in live], stated=[ep.stated] * n)
        # Score every expansion first; build walkers, memories and alternatives only for the
        # `beam` that survive (the same ones, in the same order, as building all of them).
        expansions: list[tuple[float, int, int]] = []
        for i, b in enumerate(live):
            lp = logp[i]
            finished.append(_Beam(b.walker, b.h, b.logp + float(lp[0]), b.steps))
            order = np.argsort(-lp[1:1 + len(cands[i].facts)], kind="stable")[:beam]
            expansions += [(b.logp + float(lp[1 + j]), i, int(j)) for j in order]
        expansions.sort(key=lambda x: -x[0])
        nxt: list[_Beam] = []
        ranked: dict = {}  # per walker: its options sorted best first, for the alternatives
        for lpj, i, j in expansions[:beam]:
            b, c = live[i], cands[i]
            probs = np.exp(logp[i])
            if i not in ranked:
                ranked[i] = np.argsort(-probs, kind="stable")
            f, d, e = int(c.facts[j]), int(c.dirs[j]), int(c.nexts[j])
            fetch = Fetch(t, f, d, float(probs[1 + j]), b.walker.entity, e,
                          _alternatives(probs, batch["facts"][i], 1 + j, ranked[i]))
            w = Walker(e, b.walker.fetched + (f,), b.walker.visited + (e,))
            h = pol.next_memory(P, ops, b.h, crepr[i, j])
            nxt.append(_Beam(w, h, lpj, b.steps + (fetch,)))
        live = nxt
    finished += live  # the hop limit ends every walk where it stands
    scores: dict = {}
    best: dict = {}
    for b in sorted(finished, key=lambda b: -b.logp):
        e = b.walker.entity
        scores[e] = scores.get(e, 0.0) + math.exp(b.logp)
        best.setdefault(e, b.steps)
    return _finish(scores, best, starts)


def _entity_map(policy: pol.Policy, graph: Graph):
    """policy.entity_map for this graph, remembered on the policy (None: no entity vectors)."""
    if not policy.settings.get("entities"):
        return None
    cached = policy.__dict__.get("_entmap")
    if cached is None or cached[0] is not graph:
        cached = (graph, policy.entity_map(graph.entity_names))
        policy.__dict__["_entmap"] = cached
    return cached[1]


def _softmax(x: np.ndarray) -> np.ndarray:
    y = np.exp((x - x.max()) / SIM_TEMPERATURE)
    return y / y.sum()


def _answer_end(graph: Graph, fact: int, seen: set) -> tuple[int, int]:
    """Which end of the last fact answers: the end not seen before (object when both are new)."""
    s, o = int(graph.subj[fact]), int(graph.obj[fact])
    if o not in seen or s in seen:
        return o, 0
    return s, 1


def greedy(graph: Graph, ep: Episode, hops: int = 2, pool: int = 50) -> Outcome:
    """Baseline: fetch the fact most similar to the question plus the texts fetched so far."""
    qvec, starts, hidden = ep.qvec, ep.starts, ep.hidden
    fetched: list[int] = []
    steps: list[Fetch] = []
    seen = set(starts)
    ranked: dict = {}
    here = starts[0] if starts else -1
    for t in range(hops):
        query = qvec + (np.asarray(graph.fact_vecs[fetched]).sum(0) if fetched else 0.0)
        query = query / max(float(np.linalg.norm(query)), 1e-9)
        top = graph.dense_search(query, pool, exclude=set(fetched) | hidden)
        if len(top) == 0:
            break
        sims = np.asarray(graph.fact_vecs[top]) @ query
        probs = _softmax(sims)
        f = int(top[0])
        end, d = _answer_end(graph, f, seen)
        alts = [(int(top[j]), float(probs[j])) for j in range(1, min(len(top), N_ALTERNATIVES + 1))]
        steps.append(Fetch(t, f, d, float(probs[0]), here, end, alts))
        if t == hops - 1:
            for j, g in enumerate(top):
                e, _ = _answer_end(graph, int(g), seen)
                ranked[e] = max(ranked.get(e, 0.0), float(probs[j]))
        fetched.append(f)
        seen |= {int(graph.subj[f]), int(graph.obj[f])}
        here = end
    out = _finish(ranked, {k: steps for k in ranked}, starts)
    return out


def walk(graph: Graph, ep: Episode, hops: int = 2) -> Outcome:
    """Baseline: from the linked entity, follow the touching fact most similar to the question."""
    qvec, starts, hidden = ep.qvec, ep.starts, ep.hidden
    if not starts:
        return Outcome([], [], starts, 0.0, True, "no entity of the store is named in the question")
    here = starts[0]
    fetched: list[int] = []
    steps: list[Fetch] = []
    ranked: dict = {}
    for t in range(hops):
        facts, dirs = graph.neighbours(here)
        keep = [i for i, f in enumerate(facts) if int(f) not in fetched and int(f) not in hidden]
        if not keep:
            break
        facts, dirs = np.asarray(facts)[keep], np.asarray(dirs)[keep]
        sims = np.asarray(graph.fact_vecs[facts]) @ qvec
        order = np.argsort(-sims, kind="stable")
        probs = _softmax(sims[order])
        j = int(order[0])
        f, d = int(facts[j]), int(dirs[j])
        nxt = graph.far_end(f, d)
        alts = [(int(facts[order[k]]), float(probs[k]))
                for k in range(1, min(len(order), N_ALTERNATIVES + 1))]
        steps.append(Fetch(t, f, d, float(probs[0]), here, nxt, alts))
        if t == hops - 1:
            for k, o in enumerate(order):
                e = graph.far_end(int(facts[o]), int(dirs[o]))
                ranked[e] = max(ranked.get(e, 0.0), float(probs[k]))
        fetched.append(f)
        here = nxt
    if not ranked:
        ranked = {here: 1.0}
    return _finish(ranked, {k: steps for k in ranked}, starts)
