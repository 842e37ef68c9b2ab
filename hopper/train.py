"""Training: REINFORCE with reward-to-go, a leave-one-out baseline, an entropy bonus and action dropout.

For each question the policy walks K times (rollouts).  A walk earns R = 1 if it stops on a
gold answer, else 0 (in the first epochs up to ``type_reward`` for an answer of the right
kind, fading to 0), less ``fetch_cost`` per fetch.  With r_t the reward at hop t,

    reward-to-go      G_t = sum_{t' >= t} r_t'
    baseline          b_t = mean of G_t over the question's other K - 1 rollouts (leave one out)
    policy gradient   grad J = E[ sum_t (G_t - b_t) grad log pi(a_t | s_t) ]      (Williams 1992)

and the loss minimised is  - sum_t (G_t - b_t) log pi(a_t | s_t) - beta * H(pi(. | s_t))
(see ``reinforce_loss``; by default each question's advantages are divided by the spread of
its rollouts' returns).  Adam, gradient clipping, mini-batches of questions, early stopping on
validation Hits@1 from beam search, all seeded.  With ``members`` > 1 (default 3) the run trains
that many policies from different seeds, side by side where there are cores for it, and they
answer with their mean probabilities (``fit_members``, ``policy.mixture_step``).
"""
from __future__ import annotations

import math
import sys
import time
from dataclasses import asdict, dataclass, replace

import numpy as np

from . import policy as pol
from .env import Episode, Graph, Walker, candidates, pad_candidates
from .errors import InputError


@dataclass
class TrainSettings:
    """Every knob of a training run; stored with the policy so a run can be repeated."""

    max_hops: int = 4
    hidden: int = 64
    rollouts: int = 12          # K walks per question, for the leave-one-out baseline
    batch_questions: int = 16
    epochs: int = 30
    lr: float = 1e-2
    entropy: float = 0.05       # beta, the entropy bonus
    action_dropout: float = 0.3  # chance each action (STOP too) is hidden from the sampler
    fetch_cost: float = 0.01    # reward lost per fetch: prefer short paths that still answer
    type_reward: float = 0.3    # shaping: credit for a wrong answer of the right kind (x overlap),
    shaping_epochs: int = 10    # fading to nothing over this many epochs (decoys share kinds)
    scale_advantage: bool = True  # weigh questions equally (see reinforce_loss)
    grad_clip: float = 1.0
    patience: int = 8           # epochs without a better validation score before stopping
    beam: int = 16
    adj_cap: int = 32           # touching facts offered per hop (hubs are pre-ranked and cut)
    seed: int = 0
    time_budget: float = 0.0    # seconds; 0 = no limit
    sentence_dropout: float = 0.5  # chance a question's sentence view is hidden in a rollout batch
    question_view: str = "both"  # the policy reads the question's sentence vector, its words, or both
    entity_embed: bool = False  # learn a vector per entity (fixed entity sets, e.g. UMLS); off
    #                             keeps the policy entity-free, so it carries to unseen entities
    reward_scorer: str = "none"  # "complex": a wrong answer of a completion question earns a
    #                              one-hop ComplEx scorer's probability (hopper.scorer), not 0;
    #                              the policy keeps the scorer to weigh answers (keep_scorer)
    scorer_epochs: int = 100    # training epochs of that scorer (hopper.scorer.fit_scorer)
    completion_episodes: str = "one-answer"  # completion questions whose answers facts state:
    #                              "one-answer": an episode per answer, only its facts hidden,
    #                              the other answers visible and unrewarded (as a test meets
    #                              the query, env.one_answer_each); "all-answers": one episode,
    #                              every answer's facts hidden; "all-then-one": all-answers
    #                              for the first ``switch_epochs`` epochs, then one-answer
    switch_epochs: int = 5      # all-answers epochs before "all-then-one" switches
    members: int = 3            # policies trained from different seeds and answering together
    #                             (their mean probabilities): steadier on wordings unlike the
    #                             training questions' than any one of them, at M times the
    #                             training work (``fit_members``)
    workers: int = 0            # processes training members side by side (0: one per core)
    chains: bool = True         # hold walks to the relation chains (made by > based in ...)
    #                             the training questions are answered by
    #                             (env.question_chains): a fetch that stays on one and a walk
    #                             that completed one are marked, and a walk midway along one
    #                             is not offered STOP (policy.chain_marks)

    def validate(self) -> None:
        checks = {
            "max_hops": 1 <= self.max_hops <= 8, "hidden": 4 <= self.hidden <= 1024,
            "rollouts": 2 <= self.rollouts <= 256, "batch_questions": self.batch_questions >= 1,
            "epochs": self.epochs >= 1, "lr": 0 < self.lr < 1, "entropy": self.entropy >= 0,
            "action_dropout": 0 <= self.action_dropout < 1, "fetch_cost": 0 <= self.fetch_cost < 1,
            "type_reward": 0 <= self.type_reward < 1, "shaping_epochs": self.shaping_epochs >= 1,
            "grad_clip": self.grad_clip > 0, "patience": self.patience >= 1,
            "beam": 1 <= self.beam <= 256, "adj_cap": 2 <= self.adj_cap <= 4096, "seed": self.seed >= 0, "time_budget": self.time_budget >= 0,
            "question_view": self.question_view in pol.VIEWS,
            "sentence_dropout": 0 <= self.sentence_dropout < 1,
            "reward_scorer": self.reward_scorer in ("none", "complex"),
            "scorer_epochs": self.scorer_epochs >= 1,
            "completion_episodes": self.completion_episodes in ("one-answer", "all-answers",
                                                                 "all-then-one"),
            "switch_epochs": self.switch_epochs >= 0,
            "members": 1 <= self.members <= 16, "workers": 0 <= self.workers <= 64,
        }
        for name, ok in checks.items():
            if not ok:
                raise InputError(f"out of range: {getattr(self, name)!r}", field=name)


def reward_to_go(rewards: np.ndarray) -> np.ndarray:
    """G_t = sum_{t' >= t} r_t' along the last axis (rewards [..., T])."""
    return np.flip(np.cumsum(np.flip(rewards, -1), -1), -1)


def loo_baseline(returns: np.ndarray, active: np.ndarray) -> np.ndarray:
    """Leave-one-out mean of G_t over the other rollouts of the same question at the same hop.

    returns, active: [Q, K, T].  Where no other rollout was still walking at hop t the
    baseline is 0.
    """
    g = returns * active
    total, count = g.sum(1, keepdims=True), active.sum(1, keepdims=True)
    others = count - active
    return np.where(others > 0, (total - g) / np.maximum(others, 1), 0.0)


def rollout(P, ops, graph: Graph, relmap, eps: list, K: int, T: int, dropout: float,
            gen, rng: np.random.Generator, greedy: bool = False, cap: int = 32,
            type_reward: float = 0.0, qx: dict | None = None, entmap=None, scorer=None):
    """Sample K walks per episode with the torch policy ``P``.

    ``qx`` maps id(episode) to its question features (``policy.question_features``);
    without it they are computed from ``P``'s fixed arrays.  ``entmap``: graph entity -> row
    of the learned entity vectors (None: none).  ``scorer`` (hopper.scorer.Scorer): a walk of a
    completion question that ends on a wrong entity earns the scorer's probability for it;
    one that ends on an answer a visible fact already states earns 0.

    Returns (log pi(a_t) [B, T] tensor, entropy [B, T] tensor, correct [B], active [B, T],
    final entity [B], fetch counts [B], last hop [B]), with B = len(eps) * K.
    """
    torch = ops.torch
    B = len(eps) * K
    walkers = [Walker(ep.starts[k % len(ep.starts)], (), (ep.starts[k % len(ep.starts)],))
               for ep in eps for k in range(K)]
    owner = [ep for ep in eps for _ in range(K)]
    if qx is None:
        fixed = {k: P[k].detach().numpy() for k in pol.FIXED}
        qx = {id(ep): pol.question_features(fixed, ep.qstate, ep.word_vecs) for ep in eps}
    q = ops.asarray(np.stack([qx[id(ep)] for ep in owner]))
    H = P["W_h"].shape[0]
    h = torch.zeros(B, H)
    alive = np.ones(B, bool)
    logps, ents = [], []
    active = np.zeros((B, T), np.float32)
    fetches = np.zeros(B, np.int64)
    for t in range(T):
        idx = np.flatnonzero(alive)
        step_logp = torch.zeros(B)
        step_ent = torch.zeros(B)
        if len(idx) == 0:
            logps.append(step_logp)
            ents.append(step_ent)
            continue
        cands = [_candidates_cached(graph, walkers[i], owner[i], t, T, cap) for i in idx]
        batch = pad_candidates(cands)
        asked = np.array([owner[i].qrel for i in idx])
        qrel = np.where(asked >= 0, relmap[np.maximum(asked, 0)], -1) if len(relmap) else None
        logp, crepr = pol.step(P, ops, graph, relmap, q[idx], h[idx], np.full(len(idx), t), batch,
                               qrel=qrel, entmap=entmap,
                               start=[walkers[i].visited[0] for i in idx],
                               stated=[owner[i].stated for i in idx])
        with torch.no_grad():
            probs = logp.exp()
            if greedy:
                a = probs.argmax(-1)
            else:
                if dropout > 0:  # action dropout: hide some actions from the sampler (exploration)
                    keep = torch.as_tensor(rng.random(tuple(probs.shape)) >= dropout)
                    p2 = probs * keep
                    empty = p2.sum(-1, keepdim=True) <= 0
                    probs = torch.where(empty, probs, p2)
                a = torch.multinomial(probs / probs.sum(-1, keepdim=True), 1, generator=gen)[:, 0]
        rows = torch.arange(len(idx))
        it = torch.as_tensor(idx)
        step_logp = step_logp.index_put((it,), logp[rows, a])
        ent = -(logp.exp() * logp.clamp(min=-50.0)).sum(-1)
        step_ent = step_ent.index_put((it,), ent)
        logps.append(step_logp)
        ents.append(step_ent)
        active[idx, t] = 1.0
        a_np = a.numpy()
        moved = np.flatnonzero(a_np > 0)
        for m in moved:
            i, j = idx[m], a_np[m] - 1
            c = cands[m]
            f, e = int(c.facts[j]), int(c.nexts[j])
            walkers[i] = Walker(e, walkers[i].fetched + (f,), walkers[i].visited + (e,))
            fetches[i] += 1
        alive[idx[a_np == 0]] = False
        if len(moved):
            chosen = crepr[torch.as_tensor(moved), torch.as_tensor(a_np[moved] - 1)]
            h = h.index_put((torch.as_tensor(idx[moved]),),
                            pol.next_memory(P, ops, h[torch.as_tensor(idx[moved])], chosen))
    final = np.array([w.entity for w in walkers])
    correct = np.array([final[i] in owner[i].gold for i in range(B)], np.float32)
    if type_reward > 0:  # shaping: partial credit for stopping on an entity of the answer's kind
        for i in np.flatnonzero(correct == 0):
            correct[i] = type_reward * max((kind_overlap(graph, int(final[i]), g_) for g_ in owner[i].gold),
                                           default=0.0)
    if scorer is not None:  # shaping (Lin et al. 2018): a wrong end earns the scorer's belief
        wrong = np.array([i for i in np.flatnonzero(correct < 1) if owner[i].qrel >= 0], np.int64)
        if len(wrong):
            starts_, rels_ = [owner[i].starts[0] for i in wrong], [owner[i].qrel for i in wrong]
            p = scorer.probs(starts_, rels_)
            correct[wrong] = np.maximum(correct[wrong], p[np.arange(len(wrong)), final[wrong]])
    for i in np.flatnonzero(correct < 1):  # an answer a visible fact already states tells nothing
        if final[i] in owner[i].stated:
            correct[i] = 0.0
    last = np.maximum(active.sum(1).astype(np.int64) - 1, 0)  # the hop of each walk's last decision
    return (torch.stack(logps, 1), torch.stack(ents, 1), correct, active, final, fetches, last)


def epoch_episodes(settings: TrainSettings, epoch: int, all_eps: list, one_eps: list) -> list:
    """The completion episodes an epoch (counted from 0) trains on.  "all-then-one" is a
    curriculum: every answer of a query hidden and rewarded at once (several rewarded ends,
    so early random walks find some) for the first ``switch_epochs`` epochs, then one episode
    per stated answer (``env.one_answer_each``: the query as the filtered test asks it)."""
    mode = settings.completion_episodes
    if mode == "all-answers" or (mode == "all-then-one" and epoch < settings.switch_epochs):
        return all_eps
    return one_eps


def _candidates_cached(graph: Graph, walker: Walker, ep: Episode, t: int, T: int, cap: int):
    """candidates(), remembered per episode and walk state: rollouts of one question mostly
    retrace each other's steps."""
    key = ("cand", walker.visited, walker.fetched, t)
    c = ep.prerank.get(key)
    if c is None:
        c = candidates(graph, walker, ep.qvec, t, T, frozenset(ep.starts), ep.hidden,
                       prerank_cache=ep.prerank, cap=cap)
        ep.prerank[key] = c
    return c


def _drop_sentence(qx: dict, batch: list, k: int, p: float, rng) -> dict:
    """Hide the sentence view (the first k features) of some questions, so the policy also
    learns to act on the word view alone (robust when the sentence view is unlike training)."""
    if p <= 0 or k == 0:
        return qx
    out = {}
    for ep in batch:
        x = qx[id(ep)]
        if rng.random() < p:
            x = x.copy()
            x[:k] = 0.0
        out[id(ep)] = x
    return out


def kind_overlap(graph: Graph, a: int, b: int) -> float:
    """Jaccard overlap of the (relation, direction) kinds of facts touching two entities.

    Entities of one kind (two cities, two suppliers) take part in the same kinds of facts, so
    this says "the walk stopped on the right sort of thing" without naming types anywhere.
    """
    cache = graph.__dict__.setdefault("_kinds", {})

    def kinds(e):
        if e not in cache:
            f, d = graph.neighbours(e)
            cache[e] = frozenset((graph.rel[np.asarray(f, np.int64)].astype(np.int64) * 2 + d).tolist())
        return cache[e]

    ka, kb = kinds(a), kinds(b)
    return len(ka & kb) / len(ka | kb) if ka | kb else 0.0


def episode_rewards(correct, active, fetches, last, fetch_cost: float) -> np.ndarray:
    """r_t for every walk: -fetch_cost on each hop that fetched, +1 on the last hop if right."""
    B, T = active.shape
    rewards = np.zeros((B, T), np.float32)
    for i in range(B):
        rewards[i, :int(fetches[i])] -= fetch_cost
        rewards[i, last[i]] += correct[i]
    return rewards


def reinforce_loss(logp, ent, rewards, active, K: int, entropy_weight: float,
                   scale: bool = False):
    """The REINFORCE loss with reward-to-go and the leave-one-out baseline (see module doc).

    With ``scale`` each question's advantages are divided by the spread of its rollouts'
    returns (plus 0.1), so a hard question whose rare successes carry the only signal weighs
    as much as an easy one.  That reweights questions; within a question the estimator is
    the plain one above.
    """
    import torch

    B, T = active.shape
    G = reward_to_go(rewards)                                          # G_t
    b = loo_baseline(G.reshape(-1, K, T), active.reshape(-1, K, T)).reshape(B, T)  # b_t
    A = (G - b) * active                                               # (G_t - b_t), 0 off-walk
    if scale:
        R = G[:, 0].reshape(-1, K)                                     # each rollout's return
        spread = np.repeat(R.std(1), K)[:, None]
        A = A / (spread + 0.1)
    adv = torch.as_tensor(A, dtype=logp.dtype)
    act = torch.as_tensor(active)
    n = max(float(active.sum()), 1.0)
    pg = -(adv * logp).sum() / len(adv)                              # - sum_t A_t log pi(a_t|s_t)
    bonus = (ent * act).sum() / n                                     # mean entropy of pi
    return pg - entropy_weight * bonus


def hits_and_rank(outcome, gold: frozenset) -> tuple[float, float]:
    """(Hits@1, reciprocal rank) of a ranked answer list against the gold set."""
    for rank, (e, _) in enumerate(outcome.ranked, start=1):
        if e in gold:
            return float(rank == 1), 1.0 / rank
    return 0.0, 0.0


def _numpy_params(P) -> dict:
    return {k: v.detach().numpy().copy() for k, v in P.items()}


def validate(graph: Graph, policy: pol.Policy, eps: list, beam: int):
    """Beam-search every episode; return (Hits@1, MRR, [(confidence, correct)])."""
    from .search import beam_search_many

    relmap = policy.relation_map(graph.relation_names)
    hits, rr, conf = [], [], []
    for ep, out in zip(eps, beam_search_many(graph, policy, eps, beam=beam, relmap=relmap)):
        h, r = hits_and_rank(out, ep.gold)
        hits.append(h)
        rr.append(r)
        conf.append((out.confidence, h))
    return float(np.mean(hits)) if hits else 0.0, float(np.mean(rr)) if rr else 0.0, conf


SCORER_WEIGHTS = (0.0, 0.5, 1.0, 2.0, 4.0, 8.0, 16.0)  # powers of the scorer tried on validation


def keep_scorer(graph: Graph, policy: pol.Policy, scorer, valid_eps: list, beam: int,
                log=None) -> None:
    """Keep the reward scorer in ``policy`` and set the power its probability weighs completion
    answers with (``hopper.search.weigh_by_scorer``): the weight in SCORER_WEIGHTS with the best
    validation Hits@1 (then MRR; the smaller weight on a tie, 0 = the beam scores alone).
    With 0 the scorer is not kept (its arrays would only take room in the store)."""
    policy.params |= {"S_ent": scorer.ent, "S_rel": scorer.rel}
    policy.settings["scorer_entities"] = list(graph.entity_names)
    policy.settings["scorer_loss"] = scorer.loss  # how its scores become probabilities
    tried = []
    for w in SCORER_WEIGHTS:
        policy.settings["scorer_weight"] = w
        vh, vm, _ = validate(graph, policy, valid_eps, beam)
        tried.append((vh, vm, -w))
    best = max(tried)
    policy.settings["scorer_weight"] = -best[2]
    if best[2] == 0:
        del policy.params["S_ent"], policy.params["S_rel"], policy.settings["scorer_entities"]
        del policy.settings["scorer_loss"]
    if log:
        log("scorer weight on validation Hits@1: " +
            ", ".join(f"{-w:g}: {h:.3f}" for h, _, w in tried) + f"; kept {-best[2]:g}")


def choose_threshold(conf: list) -> float:
    """The confidence below which to abstain: maximise (right answers - wrong answers) kept."""
    if not conf:
        return 0.0
    pairs = sorted(conf)
    best_t, best = 0.0, sum(1 if h else -1 for _, h in pairs)
    right = sum(h for _, h in pairs)
    wrong = len(pairs) - right
    for c, h in pairs:  # raising the threshold past c drops this answer
        right -= h
        wrong -= 1 - h
        if right - wrong > best:
            best, best_t = right - wrong, c + 1e-6
    return float(best_t)


def snapshot(P, opt, gen, rng, epoch: int, finished: bool, curve: list, best: tuple,
             best_params: dict, stale: int, rollouts: int, seconds: float,
             vocabulary: list) -> tuple[dict, dict]:
    """The whole state of a training run after an epoch, as (numeric arrays, JSON-able meta).

    Arrays: the parameters (``param.*``), the best parameters so far (``best.*``), Adam's
    moment estimates and step counts (``adam.<i>.*``) and the torch random generators'
    states; meta: the epoch, the numpy generator's state, the curve, the best scores, the
    patience count, the training vocabulary (the rows of ``w_vocab``).  Nothing here needs
    pickle to store or read.
    """
    import torch

    arrays = {f"param.{k}": v.detach().numpy().copy() for k, v in P.items()}
    arrays |= {f"best.{k}": np.asarray(v) for k, v in best_params.items()}
    for i, st in opt.state_dict()["state"].items():
        for name, value in st.items():
            arrays[f"adam.{i}.{name}"] = value.detach().numpy().copy() if torch.is_tensor(value) \
                else np.asarray(value)
    arrays["rng.torch_generator"] = gen.get_state().numpy().copy()
    arrays["rng.torch_global"] = torch.get_rng_state().numpy().copy()
    meta = {"epoch": epoch, "finished": finished, "curve": curve, "best": list(best),
            "stale": stale, "rollouts": rollouts, "seconds": round(seconds, 3),
            "numpy_rng": rng.bit_generator.state, "vocabulary": list(vocabulary)}
    return arrays, meta


def restore(checkpoint: tuple[dict, dict], opt, gen, rng) -> dict:
    """Put a ``snapshot`` back: Adam's state and the random generators; return the rest."""
    import torch

    arrays, meta = checkpoint
    sd = opt.state_dict()
    state = {}
    for key, value in arrays.items():
        if key.startswith("adam."):
            _, i, name = key.split(".", 2)
            state.setdefault(int(i), {})[name] = torch.from_numpy(np.array(value))
    sd["state"] = state
    opt.load_state_dict(sd)
    gen.set_state(torch.from_numpy(np.array(arrays["rng.torch_generator"], np.uint8)))
    torch.set_rng_state(torch.from_numpy(np.array(arrays["rng.torch_global"], np.uint8)))
    rng.bit_generator.state = meta["numpy_rng"]
    best_params = {k[len("best."):]: np.array(v, np.float32) for k, v in arrays.items()
                   if k.startswith("best.")}
    return {"epoch": int(meta["epoch"]), "finished": bool(meta["finished"]),
            "curve": list(meta["curve"]), "best": tuple(meta["best"]), "best_params": best_params,
            "stale": int(meta["stale"]), "rollouts": int(meta["rollouts"]),
            "seconds": float(meta["seconds"])}


def fit(graph: Graph, train_eps: list, valid_eps: list, settings: TrainSettings,
        progress: bool | None = None, log=None, save_checkpoint=None,
        resume_from: tuple[dict, dict] | None = None) -> tuple[pol.Policy, dict]:
    """Train a policy on ``train_eps``, early-stopping on ``valid_eps``; return it and a summary.

    After every epoch ``save_checkpoint(arrays, meta)`` (if given) receives the whole training
    state (see ``snapshot``); ``resume_from`` is such a pair, from which training continues
    exactly where it was, so an interrupted and resumed run ends with the same policy as an
    uninterrupted one.
    """
    from threadpoolctl import threadpool_limits

    import torch

    settings.validate()
    chains = None
    if settings.chains:  # found once, for every member
        from .env import question_chains

        chains = question_chains(graph, train_eps, settings.max_hops)
    threads = torch.get_num_threads()
    torch.set_num_threads(1)  # tiny tensors: more threads only wait for each other
    try:
        with threadpool_limits(limits=1, user_api="blas"):
            if settings.members > 1:
                return fit_members(graph, train_eps, valid_eps, settings, progress, log,
                                   save_checkpoint, resume_from, chains)
            return _fit(graph, train_eps, valid_eps, settings, progress, log, save_checkpoint,
                        resume_from, chains)
    finally:
        torch.set_num_threads(threads)


def member_seed(seed: int, i: int) -> int:
    """The seed of ensemble member i: the run's own seed for the first, derived ones after."""
    return seed if i == 0 else int(np.random.SeedSequence([seed, i]).generate_state(1)[0])


def member_workers(settings, n_members: int) -> int:
    """Processes that train members side by side: ``settings.workers`` (0: one per core the
    process may use), never more than the members; 1 where processes cannot be forked."""
    import multiprocessing as mp
    import os

    if n_members <= 1 or "fork" not in mp.get_all_start_methods():
        return 1
    cores = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1)
    return max(1, min(n_members, settings.workers or cores))


_MEMBER_JOB: dict = {}  # what a forked member process trains on (inherited, never pickled)


def _die_with_parent(parent: int) -> None:
    """Ask Linux to kill this process when its parent dies (a killed ``train`` must not leave
    members training on); where that cannot be asked, nothing happens."""
    import os
    import signal

    try:
        import ctypes

        ctypes.CDLL(None, use_errno=True).prctl(1, signal.SIGKILL)  # 1: PR_SET_PDEATHSIG
    except (OSError, AttributeError):
        return
    if os.getppid() != parent:  # the parent died before the request took effect
        os._exit(1)


def _train_member(i: int):
    """In a forked process: train member i quietly, counting its batches in the shared
    ``batches`` array (the parent's progress bar reads it); return its arrays, settings and
    summary."""
    from threadpoolctl import threadpool_limits

    import torch

    torch.set_num_threads(1)
    job = _MEMBER_JOB
    batches = job["batches"]

    def tick(planned: int):
        batches[2 * i] += 1           # this process alone writes slots 2i and 2i + 1
        batches[2 * i + 1] = planned

    with threadpool_limits(limits=1, user_api="blas"):
        policy, summary = _fit(job["graph"], job["train"], job["valid"], job["settings"][i],
                               False, None, chains=job["chains"], tick=tick)
    return policy.params, policy.settings, summary


def _side_by_side(graph, train_eps, valid_eps, member_settings: dict, workers: int, finish,
                  log, chains=None, progress: bool = False) -> None:
    """Train members in ``workers`` forked processes; ``finish`` each as it ends (in the
    parent, which also writes the checkpoint of the finished members).  With ``progress``
    the parent shows one bar for all of them: each member counts its batches in an array
    the processes share, and the parent reads it twice a second."""
    import gc
    import multiprocessing as mp
    import os
    from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait

    ctx = mp.get_context("fork")
    # per member: batches done, batches planned (epochs x batches per epoch); made before
    # the fork, so the processes share it
    batches = ctx.Array("q", 2 * (max(member_settings) + 1), lock=False)
    _MEMBER_JOB.update(graph=graph, train=train_eps, valid=valid_eps, settings=member_settings,
                       chains=chains, batches=batches)
    bar = None
    if progress:
        from tqdm import tqdm

        bar = tqdm(total=None, desc=f"training {len(member_settings)} members", unit="batch",
                   file=sys.stderr)
    if log:
        log(f"training members {', '.join(str(i + 1) for i in member_settings)} "
            f"side by side in {workers} processes")
    # Objects the parent holds (an encoder's onnxruntime session, say) must never be collected
    # in a child: their destructors wait on threads that do not exist after fork (a member
    # hung so).  gc.freeze() moves everything alive now out of the collector's sight, as the
    # gc module's documentation advises before fork() without exec().
    gc.collect()
    gc.freeze()
    try:
        # the request to die with the parent is made as each process starts, before it waits
        # for a member to train: one still waiting when its parent is killed would wait forever
        with ProcessPoolExecutor(max_workers=workers, mp_context=ctx,
                                 initializer=_die_with_parent, initargs=(os.getpid(),)) as ex:
            jobs = {ex.submit(_train_member, i): i for i in member_settings}
            pending = set(jobs)
            while pending:
                ended, pending = wait(pending, timeout=0.5, return_when=FIRST_COMPLETED)
                for job in ended:
                    i = jobs[job]
                    finish(i, *job.result(), save=True)
                    batches[2 * i + 1] = batches[2 * i]  # early stopping left the rest undone
                plans = [batches[2 * i + 1] for i in member_settings]
                if bar is not None and any(plans):  # a member not started yet: as the others
                    bar.total = sum(p or max(plans) for p in plans)
                    bar.update(sum(batches[2 * i] for i in member_settings) - bar.n)
    finally:
        if bar is not None:
            bar.close()
        gc.unfreeze()
        _MEMBER_JOB.clear()


def fit_members(graph, train_eps, valid_eps, settings, progress=None, log=None,
                save_checkpoint=None, resume_from=None, chains=None):
    """Train ``settings.members`` policies (seeds ``member_seed``) and join them into one
    policy answering with their mean probabilities.

    Each member is a whole ``_fit`` run with its own early stopping; the threshold is then
    chosen on the ensemble's validation answers.  Members train side by side, one process
    each, on as many cores as there are (``member_workers``; forked, so they share the
    graph); a member's numbers do not depend on which process trained it, so the policy is
    the same whatever the number of workers.  The checkpoint holds the finished members
    (``member<i>.*`` arrays, their settings and summaries in ``members_done``); trained one
    at a time, also the running member's state.  A resumed run skips the finished members
    and continues the running one; members that were training side by side start again.
    """
    M = settings.members
    started = time.monotonic()
    done: dict = {}            # member -> (params, settings, summary), once finished
    running, member_resume = None, None
    if resume_from is not None:
        arrays, meta = resume_from
        for key, (st, sm) in meta.get("members_done", {}).items():
            pre = f"member{key}."
            done[int(key)] = ({k[len(pre):]: np.asarray(v, np.float32) for k, v in arrays.items()
                               if k.startswith(pre)}, st, sm)
        running = meta.get("member")
        if running is not None and "param.W_h" in arrays:
            member_resume = ({k: v for k, v in arrays.items() if not k.startswith("member")}, meta)
    todo = [i for i in range(M) if i not in done]
    workers = member_workers(settings, len(todo))
    rounds = -(-M // max(workers, 1))

    def member_settings(i):
        return replace(settings, seed=member_seed(settings.seed, i), members=1,
                       time_budget=settings.time_budget / rounds)

    def kept(running_member):
        arrays = {f"member{j}.{k}": v for j, (p, _, _) in done.items() for k, v in p.items()}
        return arrays, {"member": running_member,
                        "members_done": {str(j): [st, sm] for j, (_, st, sm) in done.items()}}

    def finish(i, policy_params, policy_settings, summary, save: bool):
        done[i] = (policy_params, policy_settings, summary)
        if save and save_checkpoint is not None:
            save_checkpoint(*kept(None))
        if log:
            log(f"member {i + 1} of {M} (seed {policy_settings['seed']}) done: "
                f"{summary['epochs']} epochs, validation Hits@1 {summary['valid_hits1']:.3f}")

    if workers > 1:
        _side_by_side(graph, train_eps, valid_eps, {i: member_settings(i) for i in todo},
                      workers, finish, log, chains,
                      progress=sys.stderr.isatty() if progress is None else progress)
    for i in (todo if workers <= 1 else []):
        def save(arrays, meta, i=i):
            extra_arrays, extra_meta = kept(i)
            save_checkpoint(arrays | extra_arrays, meta | extra_meta)

        if log:
            log(f"member {i + 1} of {M} (seed {member_settings(i).seed})")
        policy, summary = _fit(graph, train_eps, valid_eps, member_settings(i), progress, log,
                               save if save_checkpoint is not None else None,
                               member_resume if i == running else None, chains)
        finish(i, policy.params, policy.settings, summary, save=False)  # the next saves it
    done = [done[i] for i in range(M)]
    first_settings = dict(done[0][1]) | {"members": M, "seed": settings.seed,
                                         "time_budget": settings.time_budget}
    others = [{k: v for k, v in p.items() if not k.startswith("S_")} for p, _, _ in done[1:]]
    policy = pol.Policy(done[0][0], first_settings, members=others)  # the scorer: the first's
    vh, vm, conf = validate(graph, policy, valid_eps, settings.beam) if valid_eps else (0.0, 0.0, [])
    policy.settings["threshold"] = choose_threshold(conf)
    sums = [sm for _, _, sm in done]
    seconds = time.monotonic() - started  # wall time: members side by side overlap
    if resume_from is not None:  # and the finished members' own time before the interruption
        seconds += sum(sm["seconds"] for i, (_, _, sm) in enumerate(done) if i not in todo)
    rollouts = sum(sm["rollouts_per_second"] * sm["seconds"] for sm in sums)
    curve, offset = [], 0
    for i, sm in enumerate(sums):  # one curve, epochs counted on across the members
        curve += [c | {"epoch": c["epoch"] + offset, "member": i + 1} for c in sm["curve"]]
        offset += sm["epochs"]
    summary = {"epochs": offset, "seconds": round(seconds, 1),
               "rollouts_per_second": round(rollouts / max(seconds, 1e-9), 1),
               "train_questions": sums[0]["train_questions"], "valid_questions": len(valid_eps),
               "valid_hits1": vh, "valid_mrr": vm, "threshold": policy.settings["threshold"],
               "members": [{"seed": st["seed"], "epochs": sm["epochs"],
                            "valid_hits1": sm["valid_hits1"]} for _, st, sm in done],
               "curve": curve}
    policy.scores = {k: v for k, v in summary.items() if k != "curve"}
    return policy, summary


def _fit(graph, train_eps, valid_eps, settings, progress, log, save_checkpoint=None,
         resume_from=None, chains=None, tick=None):
    import torch

    settings.validate()
    if progress is None:
        progress = sys.stderr.isatty()
    train_eps = [e for e in train_eps if e.starts and e.gold]
    if not train_eps:
        raise InputError("no training question names an entity of the store with a known answer",
                         field="questions", hint="check the questions match the loaded facts")
    questions = train_eps  # one per question (the question views and the scorer are fitted on
    #                        these; "all-answers" episodes, which a curriculum trains on first)
    if settings.completion_episodes in ("one-answer", "all-then-one"):
        from .env import one_answer_each

        train_eps = one_answer_each(graph, train_eps)
    torch.manual_seed(settings.seed)
    gen = torch.Generator().manual_seed(settings.seed)
    rng = np.random.default_rng(settings.seed)
    n_rel = len(graph.relation_names)
    dim = graph.fact_vecs.shape[1]
    n_ent = len(graph.entity_names) if settings.entity_embed else 0
    if resume_from is None:
        basis = (pol.question_basis(np.stack([e.qstate for e in questions]), seed=settings.seed)
                 if settings.question_view != "words" else
                 (np.zeros(dim, np.float32), np.zeros((dim, 0), np.float32)))
        words, vocabulary = None, []
        if settings.question_view != "sentence":
            *words, vocabulary = pol.word_basis([e.words for e in questions],
                                                [e.word_vecs for e in questions])
        if settings.chains and chains is None:
            from .env import question_chains

            chains = question_chains(graph, questions, settings.max_hops)
        init = pol.init_params(dim, settings.hidden, n_rel, settings.max_hops, settings.seed,
                               basis=basis, words=words, n_entities=n_ent, chains=chains)
    else:
        init = {k: resume_from[0][f"param.{k}"] for k in pol.PARAM_SHAPES}  # Adam's order
        vocabulary = list(resume_from[1]["vocabulary"])
    entmap = np.arange(n_ent) if settings.entity_embed else None
    scorer = None
    if settings.reward_scorer != "none":
        from .scorer import fit_scorer

        t0 = time.monotonic()
        scorer = fit_scorer([(e.starts[0], e.qrel, e.gold) for e in questions if e.qrel >= 0],
                            len(graph.entity_names), n_rel, epochs=settings.scorer_epochs,
                            seed=settings.seed)
        if log:
            log(f"reward scorer (ComplEx) fitted in {time.monotonic() - t0:.0f} s")
    frozen = set(pol.FIXED) | (set() if settings.entity_embed else {"N_c", "N_z", "N_s"})
    qx = {id(e): pol.question_features(init, e.qstate, e.word_vecs)
          for e in (train_eps if train_eps is questions else questions + train_eps)}
    one_eps = train_eps
    P = {k: torch.tensor(v, requires_grad=k not in frozen) for k, v in init.items()}
    opt = torch.optim.Adam([v for k, v in P.items() if k not in frozen], lr=settings.lr)
    ops = pol.TorchOps()
    relmap = np.arange(n_rel)
    base_settings = asdict(settings) | {"relations": list(graph.relation_names),
                                        "vocabulary": vocabulary}
    if settings.entity_embed:
        base_settings["entities"] = list(graph.entity_names)
    curve = []
    best = (-1.0, -1.0)
    best_params = _numpy_params(P)
    stale = 0
    rollouts_done = 0
    start_epoch, finished, spent = 0, False, 0.0
    if resume_from is not None:
        state = restore(resume_from, opt, gen, rng)
        curve, best, best_params, stale = state["curve"], state["best"], state["best_params"], state["stale"]
        rollouts_done, start_epoch, finished, spent = (state["rollouts"], state["epoch"],
                                                      state["finished"], state["seconds"])
        if log:
            log(f"resuming after epoch {start_epoch}" + (" (training had ended)" if finished else ""))
    started = time.monotonic() - spent
    n_batches = math.ceil(len(train_eps) / settings.batch_questions)
    curriculum = settings.completion_episodes == "all-then-one"
    bar = None
    if progress and not finished:
        from tqdm import tqdm
        bar = tqdm(total=settings.epochs * n_batches, initial=start_epoch * n_batches,
                   desc="training", unit="batch", file=sys.stderr)
    for epoch in range(start_epoch, settings.epochs):
        if finished:
            break
        if curriculum:
            train_eps = epoch_episodes(settings, epoch, questions, one_eps)
            n_batches = math.ceil(len(train_eps) / settings.batch_questions)
        order = rng.permutation(len(train_eps))
        shaping = settings.type_reward * max(0.0, 1.0 - epoch / settings.shaping_epochs)
        rewards_seen = []
        out_of_time = False
        for bi in range(n_batches):
            if bi and settings.time_budget and time.monotonic() - started > settings.time_budget:
                out_of_time = True  # the budget ends this epoch early (long epochs overshot it)
                break
            batch = [train_eps[i] for i in order[bi * settings.batch_questions:(bi + 1) * settings.batch_questions]]
            logp, ent, correct, active, final, fetches, last = rollout(
                P, ops, graph, relmap, batch, settings.rollouts, settings.max_hops,
                settings.action_dropout, gen, rng, cap=settings.adj_cap,
                type_reward=shaping, qx=_drop_sentence(qx, batch, init["q_proj"].shape[1],
                                                       settings.sentence_dropout, rng),
                entmap=entmap, scorer=scorer)
            rewards = episode_rewards(correct, active, fetches, last, settings.fetch_cost)
            loss = reinforce_loss(logp, ent, rewards, active, settings.rollouts, settings.entropy,
                                  scale=settings.scale_advantage)
            opt.zero_grad()
            loss.backward()
            torch.nn.utils.clip_grad_norm_([v for k, v in P.items() if k not in frozen],
                                           settings.grad_clip)
            opt.step()
            rollouts_done += len(correct)
            rewards_seen.append(float(correct.mean()))
            if bar is not None:
                bar.update(1)
                bar.set_postfix(reward=f"{np.mean(rewards_seen):.3f}")
            if tick is not None:
                tick(settings.epochs * n_batches)
        policy = pol.Policy(_numpy_params(P), base_settings)
        vh, vm, _ = validate(graph, policy, valid_eps, settings.beam) if valid_eps else (
            float(np.mean(rewards_seen)), 0.0, [])
        curve.append({"epoch": epoch + 1, "train_reward": float(np.mean(rewards_seen)),
                      "valid_hits1": vh, "valid_mrr": vm,
                      "seconds": round(time.monotonic() - started, 1)})
        stale = 0 if vh > best[0] + 1e-9 else stale + 1  # patience counts Hits@1 gains only
        if (vh, vm) > best:
            best, best_params = (vh, vm), _numpy_params(P)
        finished = (stale >= settings.patience or epoch + 1 == settings.epochs or out_of_time or
                    bool(settings.time_budget and time.monotonic() - started > settings.time_budget))
        if save_checkpoint is not None:
            save_checkpoint(*snapshot(P, opt, gen, rng, epoch + 1, finished, curve, best,
                                      best_params, stale, rollouts_done,
                                      time.monotonic() - started, vocabulary))
        if log:
            log(f"epoch {epoch + 1}: train reward {np.mean(rewards_seen):.3f}, "
                f"valid Hits@1 {vh:.3f}, MRR {vm:.3f}")
        if finished:
            break
    if bar is not None:
        bar.close()
    elapsed = time.monotonic() - started
    policy = pol.Policy(best_params, base_settings)
    if scorer is not None and valid_eps:
        keep_scorer(graph, policy, scorer, valid_eps, settings.beam, log)
    vh, vm, conf = validate(graph, policy, valid_eps, settings.beam) if valid_eps else (0.0, 0.0, [])
    policy.settings["threshold"] = choose_threshold(conf)
    summary = {"epochs": len(curve), "seconds": round(elapsed, 1),
               "rollouts_per_second": round(rollouts_done / max(elapsed, 1e-9), 1),
               "train_questions": len(train_eps), "valid_questions": len(valid_eps),
               "valid_hits1": vh, "valid_mrr": vm, "threshold": policy.settings["threshold"],
               "curve": curve}
    policy.scores = {k: v for k, v in summary.items() if k != "curve"}
    return policy, summary
