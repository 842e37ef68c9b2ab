"""Search: beam search over fetch sequences with the learned policy, and the two untrained baselines."""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from . import policy as pol
from .env import Episode, Graph, Walker, candidates_batch

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
    path = [s.fetch() if isinstance(s, _Step) else s for s in best_path[top]]
    return Outcome(ranked, path, starts, conf, False, None, float(len(path)))


@dataclass
class _Step:
    """One hop of a beam, kept cheap; made into a ``Fetch`` only for the answer's path."""

    hop: int
    fact: int
    direction: int
    from_entity: int
    to_entity: int
    logp: np.ndarray     # log pi over [STOP, candidates...] of the walker that took it
    facts: np.ndarray    # that walker's candidate facts (padded with -1)
    chosen: int          # index into logp (1 + candidate)

    def fetch(self) -> Fetch:
        probs = np.exp(self.logp)
        order = np.argsort(-probs, kind="stable")
        return Fetch(self.hop, self.fact, self.direction, float(probs[self.chosen]),
                     self.from_entity, self.to_entity,
                     _alternatives(probs, self.facts, self.chosen, order))


def beam_search(graph: Graph, policy: pol.Policy, ep: Episode, beam: int = BEAM,
                max_hops: int | None = None, relmap: np.ndarray | None = None) -> Outcome:
    """Beam search over fetch sequences; an answer's score sums the beams that end on it."""
    return beam_search_many(graph, policy, [ep], beam=beam, max_hops=max_hops, relmap=relmap)[0]


QUESTIONS_PER_BATCH = 256  # at beam BEAM; bounds the arrays of one hop (beams x candidates)


def beam_search_many(graph: Graph, policy: pol.Policy, eps: list, beam: int = BEAM,
                     max_hops: int | None = None, relmap: np.ndarray | None = None) -> list:
    """``beam_search`` for many questions at once: each hop scores the live beams of every
    question in one batch (candidates and the policy's forward pass), so a batch of
    questions costs a few large array operations instead of many small ones.  Each
    question's beams, scores and answers are its own, as if it were searched alone."""
    relmap = policy.relation_map(graph.relation_names) if relmap is None else relmap
    per_batch = max(1, QUESTIONS_PER_BATCH * BEAM // max(beam, BEAM))  # wider beams, fewer questions
    out: list = []
    for a in range(0, len(eps), per_batch):
        out += _beam_search_batch(graph, policy, eps[a:a + per_batch], beam, max_hops, relmap)
    return out


def _beam_search_batch(graph: Graph, policy: pol.Policy, eps: list, beam: int,
                       max_hops: int | None, relmap: np.ndarray) -> list:
    P = policy.params
    Ms = policy.members
    ops = pol.NumpyOps
    T = min(max_hops or policy.max_hops, policy.max_hops)
    entmap = _entity_map(policy, graph)
    cap = int(policy.settings.get("adj_cap", 32))
    H = P["W_h"].shape[0]
    outs: list = [None] * len(eps)
    todo = []
    for k, ep in enumerate(eps):
        if not ep.starts:
            outs[k] = Outcome([], [], ep.starts, 0.0, True,
                              "no entity of the store is named in the question")
        else:
            todo.append(k)
    if not todo:
        return outs
    X = {k: [pol.question_features(M, eps[k].qstate, eps[k].word_vecs) for M in Ms] for k in todo}
    linked = {k: frozenset(eps[k].starts) for k in todo}
    caches = {k: {} for k in todo}  # pre-ranked neighbours and dense results, per question
    qrel = {k: (relmap[eps[k].qrel] if eps[k].qrel >= 0 else -1) for k in todo}
    # The live beams of all questions, question by question: owner, walker, memory, log-prob, steps
    own = [k for k in todo for _ in eps[k].starts]
    walkers = [Walker(s, (), (s,)) for k in todo for s in eps[k].starts]
    hs = [np.zeros((len(own), H), np.float32) for _ in Ms]  # each member's memory of each beam
    lps = [-math.log(len(eps[k].starts)) for k in own]
    steps = [() for _ in own]
    finished: dict = {k: [] for k in todo}  # [(log-prob, entity, steps)]
    for t in range(T):
        if not own:
            break
        n = len(own)
        batch = candidates_batch(graph, walkers, np.stack([eps[k].qvec for k in own]), t, T,
                                 [linked[k] for k in own], [eps[k].hidden for k in own],
                                 [caches[k] for k in own], cap=cap)
        logp, creprs = pol.mixture_step(
            Ms, ops, graph, relmap, [np.stack([X[k][m] for k in own]) for m in range(len(Ms))],
            hs, np.full(n, t), batch, qrel=np.array([qrel[k] for k in own]), entmap=entmap,
            start=[w.visited[0] for w in walkers], stated=[eps[k].stated for k in own])
        counts = batch["counts"]
        for i, k in enumerate(own):
            finished[k].append((lps[i] + float(logp[i, 0]), walkers[i].entity, steps[i]))
        # Each beam's best `beam` expansions, then per question the best `beam` of those,
        # ties kept in the order (beam, rank): as sorting one question's list stably would.
        order = np.argsort(-logp[:, 1:], axis=1, kind="stable")[:, :beam]
        rank = np.broadcast_to(np.arange(order.shape[1]), order.shape)
        ok = order < counts[:, None]
        rows = np.broadcast_to(np.arange(n)[:, None], order.shape)[ok]
        cols, rank = order[ok], rank[ok]
        score = np.asarray(lps, np.float64)[rows] + logp[rows, 1 + cols].astype(np.float64)
        qid = np.asarray(own)[rows]
        sel = np.lexsort((rank, rows, -score, qid))
        qs_sorted = qid[sel]
        first_of = np.r_[0, np.flatnonzero(qs_sorted[1:] != qs_sorted[:-1]) + 1]
        place = np.arange(len(sel)) - np.repeat(first_of, np.diff(np.r_[first_of, len(sel)]))
        sel = sel[place < beam]
        rows, cols, score = rows[sel], cols[sel], score[sel]
        hs = [pol.next_memory(M, ops, h[rows], cr[rows, cols]).astype(np.float32) if len(rows)
              else np.zeros((0, H), np.float32) for M, h, cr in zip(Ms, hs, creprs)]
        facts, dirs, nexts = batch["facts"], batch["dirs"], batch["nexts"]
        new_own, new_walkers, new_steps = [], [], []
        for i, j in zip(rows.tolist(), cols.tolist()):
            w = walkers[i]
            f, d, e = int(facts[i, j]), int(dirs[i, j]), int(nexts[i, j])
            new_own.append(own[i])
            new_walkers.append(Walker(e, w.fetched + (f,), w.visited + (e,)))
            new_steps.append(steps[i] + (_Step(t, f, d, w.entity, e, logp[i], facts[i], 1 + j),))
        own, walkers, steps, lps = new_own, new_walkers, new_steps, score.tolist()
    for i, k in enumerate(own):  # the hop limit ends every walk where it stands
        finished[k].append((lps[i], walkers[i].entity, steps[i]))
    for k in todo:
        scores: dict = {}
        best: dict = {}
        for lp, e, st in sorted(finished[k], key=lambda b: -b[0]):
            scores[e] = scores.get(e, 0.0) + math.exp(lp)
            best.setdefault(e, st)
        if eps[k].qrel >= 0:
            scores = weigh_by_scorer(policy, graph, eps[k].starts[0], int(qrel[k]), scores)
        outs[k] = _finish(scores, best, eps[k].starts)
    return outs


def _entity_map(policy: pol.Policy, graph: Graph, key: str = "entities"):
    """policy.entity_map for this graph, remembered on the policy (None: no such rows)."""
    if not policy.settings.get(key):
        return None
    cached = policy.__dict__.get("_map_" + key)
    if cached is None or cached[0] is not graph:
        cached = (graph, policy.entity_map(graph.entity_names, key))
        policy.__dict__["_map_" + key] = cached
    return cached[1]


def weigh_by_scorer(policy: pol.Policy, graph: Graph, start: int, qrel: int, scores: dict) -> dict:
    """A completion question's answer scores times the kept one-hop scorer's probability to the
    power ``scorer_weight`` (policy.py), rescaled to the total they had (so scores keep their
    size where ``ask`` rounds them); as they were without a kept scorer, a weight of 0 or
    an asked relation the policy does not know.  An entity the scorer has no row for (added
    after training) gets the mean probability of the others."""
    weight = float(policy.settings.get("scorer_weight", 0.0))
    if weight <= 0 or qrel < 0 or not scores or "S_ent" not in policy.params:
        return scores
    rows = _entity_map(policy, graph, "scorer_entities")
    if rows is None:
        return scores
    from .scorer import Scorer

    known = len(policy.settings["scorer_entities"])
    if rows[start] >= known:
        return scores
    ents = list(scores)
    er = rows[np.asarray(ents, np.int64)]
    p = np.full(len(ents), np.nan)
    inside = er < known
    if inside.any():
        scorer = Scorer(policy.params["S_ent"], policy.params["S_rel"],
                        policy.settings.get("scorer_loss", "bce"))  # bce: policies kept before
        p[inside] = scorer.probs_of(int(rows[start]), qrel, er[inside])
    p[~inside] = np.nanmean(p) if inside.any() else 1.0
    # in logs: p ** 8 of a softmax probability can underflow where the products still differ
    with np.errstate(divide="ignore"):
        logs = np.log(np.fromiter(scores.values(), np.float64, len(ents))) + weight * np.log(p)
    if not np.isfinite(logs.max()):
        return scores
    weighed = np.exp(logs - logs.max())
    weighed *= sum(scores.values()) / weighed.sum()  # the same total as before
    return dict(zip(ents, weighed.tolist()))


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
