"""The policy: scores each fetchable fact and STOP from the walk's state; one source of its arithmetic.

The forward pass is written once against a tiny array interface (``ops``) so that training
runs it on torch tensors (for gradients) and ``ask`` runs the very same function on numpy
arrays (no torch import on the hot path).  ``tests/test_policy.py`` checks both give the same
probabilities.

    question   x = [(q - q_mean) q_proj,    (q: the question with names masked, whitened by PCA
                                            on the training questions, so wordings that differ
                                            in a few words are far apart; fixed, not trained)
                    (b - w_mean) w_scale]   (b: soft counts of the training questions' words in
                                            it; a word never seen in training counts for its
                                            nearest training words, see ``word_bag``)
    state      z_t = tanh(x W_q + h_t W_h + e_t W_e + Q[r_q] + b_hop[t] + N_z[n_t] + N_s[n_0])
                                                                          (e_t, n_t: where it
                                                                           stands, n_0: started;
                                                                           r_q: the relation asked,
                                                                           for completion questions)
    candidate  c_a = tanh(v_a W_v + u_r W_u[dir] + E[r, dir] + b_c + N_c[n_a])  (text, relation
                                                                           text, learned relation
                                                                           vector; n_a: where it
                                                                           leads)
    score      s_a = z_t . c_a / sqrt(H) + f_a . w_f + k_a w_known[t, 0]   (f_a: cheap features;
                     + l_a w_chain[t, 0]                                   k_a: 1 if a leads to an
                                                                           answer a fact states:
                                                                           a way on at hop 0, a
                                                                           dead end at the last;
                                                                           l_a: 1 if the kinds
                                                                           fetched, then a's,
                                                                           begin a chain training
                                                                           questions are answered
                                                                           by, see chain_marks)
    STOP       s_0 = z_t . w_stop + x . u_stop[t] + g_t . w_g + b_stop + k_0 w_known[t, 1]
                     + l_0 w_chain[t, 1]                                  (g_t: cheap features;
                     (-inf midway along a chain)                          k_0: stands on one;
                                                                           l_0: the kinds fetched
                                                                           are such a chain)
    policy     pi(a | state) = softmax(s)
    memory     h_{t+1} = tanh(h_t U_h + c_a U_c)                           (recurrent summary)
    ensemble   pi(a | state) = 1/M sum_m pi_m(a | state_m)                 (M members trained
                                                                           from different seeds,
                                                                           each with its own
                                                                           memory; M = 3 by
                                                                           default, see
                                                                           train.fit_members)

``N_c``, ``N_z`` and ``N_s`` are learned entity vectors (setting ``entity_embed``, off by default): one row
per entity known at training time plus a last row shared by every other entity.  Off, both have
that one row only, zero and not trained, so the policy stays entity-free and carries to
entities no training question saw; on, it can learn what each entity of a fixed set (UMLS,
Kinship) is like, as the published walkers do.

A policy trained with the one-hop scorer (``reward_scorer``, ``hopper.scorer``) keeps it as
``S_ent``/``S_rel`` and weighs a completion question's answers by it (``scorer_weight``,
chosen on the validation questions; 0 leaves the beam scores as they are; ``scorer_loss``
says whether p_scorer is a sigmoid, "bce", or a softmax over the entities, "softmax"):

    answer     score(e) ~ sum over beams ending on e of pi(beam) * p_scorer(e | start, r_q) ** w
               (rescaled to the beam scores' total)
"""
from __future__ import annotations

import numpy as np

from .env import N_CHEAP, N_STOP, pad_rows

NEG = -1e9  # the score of a padded (absent) candidate

PARAM_SHAPES = {  # name -> shape, with D the text-embedding width, H the hidden width
    "q_mean": ("D",), "q_proj": ("D", "K"),
    "w_vocab": ("V", "D"), "w_mean": ("V",), "w_scale": ("V",),
    "W_q": ("X", "H"), "W_h": ("H", "H"), "W_e": ("D", "H"), "Q": ("R1", "H"), "b_hop": ("T", "H"),
    "W_v": ("D", "H"), "W_u": (2, "D", "H"), "E": ("R2", "H"), "b_c": ("H",),
    "w_f": (N_CHEAP,), "w_stop": ("H",), "u_stop": ("T", "X"), "w_g": (N_STOP,), "b_stop": (1,),
    "U_h": ("H", "H"), "U_c": ("H", "H"),
    "N_c": ("N1", "H"), "N_z": ("N1", "H"), "N_s": ("N1", "H"),
    "w_known": ("T", 2),
    "chains": ("S", "T1"), "w_chain": ("T", 2),
}


TEXT_INPUTS = ("W_v", "W_u", "W_e")  # the weights that read unit-length sentence vectors
FIXED = ("q_mean", "q_proj", "w_vocab", "w_mean", "w_scale", "chains")  # set from the training questions
WORD_TAU = 0.05   # temperature of a question word's soft match to the training words
WORD_NULL = 0.5   # a word matching no training word better than this cosine counts for none
VIEWS = ("sentence", "words", "both")  # what of the question the policy reads


class NumpyOps:
    """The array interface on numpy (inference)."""

    tanh = staticmethod(np.tanh)

    @staticmethod
    def cat(xs, axis):
        return np.concatenate(xs, axis=axis)

    @staticmethod
    def where(mask, a, b):
        return np.where(mask, a, b)

    @staticmethod
    def log_softmax(x):
        m = x.max(axis=-1, keepdims=True)
        y = x - m
        return y - np.log(np.exp(y).sum(axis=-1, keepdims=True))

    @staticmethod
    def asarray(x, like=None):
        return np.asarray(x)

    @staticmethod
    def scatter(n, index, values, fill):
        """A length-n vector of ``fill`` with ``values`` at ``index``."""
        out = np.full(n, fill, dtype=values.dtype)
        out[index] = values
        return out


class TorchOps:
    """The array interface on torch (training)."""

    def __init__(self):
        import torch

        self.torch = torch
        self.tanh = torch.tanh

    def cat(self, xs, axis):
        return self.torch.cat(xs, dim=axis)

    def where(self, mask, a, b):
        return self.torch.where(mask, a, b)

    def log_softmax(self, x):
        return self.torch.log_softmax(x, dim=-1)

    def scatter(self, n, index, values, fill):
        out = self.torch.full((n,), fill, dtype=values.dtype)
        return out.index_put((self.torch.as_tensor(index),), values)

    def asarray(self, x, like=None):
        if isinstance(x, self.torch.Tensor):
            return x
        x = np.asarray(x)
        if not x.flags.writeable:
            x = x.copy()
        if x.dtype.kind == "f":  # floats follow torch's default dtype (float32 unless a test asks)
            return self.torch.as_tensor(x, dtype=self.torch.get_default_dtype())
        return self.torch.as_tensor(x)


def question_basis(qstates: np.ndarray, k: int = 64, seed: int = 0):
    """PCA whitening of the training questions (scikit-learn): (mean [D], projection [D, k])."""
    from sklearn.decomposition import PCA

    X = np.unique(np.asarray(qstates, np.float32), axis=0)
    k = int(min(k, max(len(X) - 1, 1), X.shape[1]))
    if len(X) < 3:
        return np.zeros(X.shape[1], np.float32), np.eye(X.shape[1], k, dtype=np.float32)
    pca = PCA(n_components=k, whiten=True, random_state=seed).fit(X)
    proj = pca.components_.T / np.sqrt(pca.explained_variance_ + 1e-6)[None, :]
    return pca.mean_.astype(np.float32), proj.astype(np.float32)


def word_bag(P: dict, word_vecs) -> np.ndarray:
    """Soft counts of the training words (rows of ``w_vocab``) in a question: [V].

    Each question word is shared among the training words by softmax(cosine / WORD_TAU), with
    a "none" option at cosine WORD_NULL: a training word counts 1 for itself, and a word never
    seen in training ("nation") counts mostly for its nearest training word ("country").
    """
    vocab = P["w_vocab"]
    if vocab.shape[0] == 0 or word_vecs is None or len(word_vecs) == 0:
        return np.zeros(vocab.shape[0], np.float32)
    logits = np.concatenate([np.asarray(word_vecs, np.float32) @ vocab.T,
                             np.full((len(word_vecs), 1), WORD_NULL, np.float32)], 1) / WORD_TAU
    logits -= logits.max(1, keepdims=True)
    w = np.exp(logits)
    w /= w.sum(1, keepdims=True)
    return w[:, :-1].sum(0).astype(np.float32)


def word_basis(word_lists: list, word_vecs: list, max_words: int = 512, min_count: int = 2):
    """The training vocabulary and the scaling of its soft counts.

    ``word_lists`` are the training questions' words, ``word_vecs`` their vectors.  Returns
    (w_vocab [V, D], w_mean [V], w_scale [V], the words).
    """
    from collections import Counter

    counts = Counter(w for ws in word_lists for w in set(ws))
    words = sorted((w for w, c in counts.items() if c >= min_count),
                   key=lambda w: (-counts[w], w))[:max_words]
    vec = {}
    for ws, vs in zip(word_lists, word_vecs):
        for w, v in zip(ws, vs):
            vec.setdefault(w, v)
    dim = next(iter(vec.values())).shape[0] if vec else 0
    vocab = np.array([vec[w] for w in words], np.float32).reshape(len(words), dim)
    P = {"w_vocab": vocab}
    bags = np.stack([word_bag(P, vs) for vs in word_vecs]) if word_vecs else np.zeros((0, len(words)))
    mean = bags.mean(0) if len(bags) else np.zeros(len(words))
    scale = 1.0 / (bags.std(0) + 0.1) if len(bags) else np.ones(len(words))
    return vocab, mean.astype(np.float32), scale.astype(np.float32), words


def question_features(P: dict, qstate, word_vecs) -> np.ndarray:
    """x: what the policy reads of the question (fixed arithmetic, numpy, not trained)."""
    qstate = np.asarray(qstate, np.float32)
    x_s = (qstate - P["q_mean"]) @ P["q_proj"]
    x_w = (word_bag(P, word_vecs) - P["w_mean"]) * P["w_scale"] if "w_vocab" in P else \
        np.zeros(0, np.float32)
    return np.concatenate([x_s, x_w]).astype(np.float32)


def init_params(dim: int, hidden: int, n_relations: int, max_hops: int, seed: int,
                basis=None, words=None, n_entities: int = 0, chains=None) -> dict:
    """Small random weights (scaled by fan-in), as float32 numpy arrays.

    ``basis`` is (q_mean, q_proj) from ``question_basis``; without it questions pass as they
    are.  ``words`` is (w_vocab, w_mean, w_scale) from ``word_basis``; without it no words.
    ``n_entities`` > 0 gives that many rows of learned entity vectors (zero at the start).
    ``chains`` are the kind sequences training questions are answered by
    (``env.question_chains``; kinds as rows of ``E``); without them the chain marks are 0.
    """
    rng = np.random.default_rng(seed)
    q_mean, q_proj = basis if basis is not None else (np.zeros(dim, np.float32),
                                                      np.eye(dim, dtype=np.float32))
    w_vocab, w_mean, w_scale = words if words is not None else (
        np.zeros((0, dim), np.float32), np.zeros(0, np.float32), np.zeros(0, np.float32))
    table = chain_table(chains or [], max_hops)
    sizes = {"D": dim, "H": hidden, "T": max_hops + 1, "R2": 2 * n_relations + 1,
             "R1": n_relations + 1, "K": q_proj.shape[1], "V": w_vocab.shape[0],
             "X": q_proj.shape[1] + w_vocab.shape[0], "N1": n_entities + 1,
             "S": table.shape[0], "T1": max_hops}
    params = {"q_mean": np.asarray(q_mean, np.float32), "q_proj": np.asarray(q_proj, np.float32),
              "w_vocab": np.asarray(w_vocab, np.float32), "w_mean": np.asarray(w_mean, np.float32),
              "w_scale": np.asarray(w_scale, np.float32), "chains": table}
    for name, shape in PARAM_SHAPES.items():
        if name in FIXED:
            continue
        shp = tuple(sizes.get(s, s) if isinstance(s, str) else s for s in shape)
        if name.startswith("b_") or name in ("w_g", "Q", "u_stop", "N_c", "N_z", "N_s", "w_known",
                                             "w_chain"):
            params[name] = np.zeros(shp, np.float32)
        else:
            fan_in = shp[-2] if len(shp) >= 2 else shp[0]
            # Text vectors are unit length (components ~ 1/sqrt(D)), so weights reading them
            # start at unit scale; the others are scaled by fan-in as usual.
            scale = 1.0 if name in TEXT_INPUTS else 1.0 / np.sqrt(fan_in)
            params[name] = (rng.standard_normal(shp) * scale).astype(np.float32)
    # Start from a sensible prior rather than noise, so early rollouts reach answers often
    # (feature order as in env.candidates):
    params["w_f"][:] = 0.0
    params["w_f"][1] = 8.0   # follow relations whose name resembles the question
    params["w_f"][3] = -2.0  # prefer facts that touch where the walk stands over facts found
    #                          by similarity alone
    params["w_f"][8] = 1.0   # each (relation, direction) kind gets equal mass, not each fact:
    #                          a node with 30 parts does not drown the rest
    params["w_f"][9] = 10.0  # prefer facts that make the path cover more of the question
    params["b_stop"][0] = 1.5  # STOP keeps a fair share (~1/3) at every hop ...
    params["w_g"][0] = -4.0    # ... but the first: the entity the question names is not its answer
    params["w_chain"][:] = 1.0  # follow the chains training questions are answered by, and
    #                             stop where one is complete (never midway: see scores)
    return params


def chain_table(chains: list, max_hops: int) -> np.ndarray:
    """Kind sequences as a [S, max_hops] float32 table (kinds as rows of ``E``, -1 padding):
    the form a policy stores them in."""
    table = np.full((len(chains), max_hops), -1, np.float32)
    for i, c in enumerate(chains):
        table[i, :len(c)] = c[:max_hops]
    return table


def chain_marks(P: dict, slots: np.ndarray, paths: np.ndarray, mask: np.ndarray):
    """(l_a [B, C], l_0 [B, 2]): 1 where fetching candidate a keeps the walk on a chain some
    training question is answered by (its kinds so far, then a's, begin one); where the kinds
    fetched so far are such a chain, whole (l_0[:, 0]); and where they are only the beginning
    of one and some candidate goes on along it (l_0[:, 1]: the walk is midway, and STOP is
    not offered).

    ``slots`` [B, C] are the candidates' kinds and ``paths`` [B, L] each walker's kinds so far
    (-1 padding), both as rows of ``E``.  Sequences are compared as integers (kind + 1 in
    base 2R + 2 per hop).
    """
    table = np.asarray(P["chains"].detach() if hasattr(P["chains"], "detach") else P["chains"])
    B, C = slots.shape
    width = table.shape[1]
    paths = np.asarray(paths, np.int64).reshape(B, -1)
    depth = (paths >= 0).sum(1)
    if table.shape[0] == 0 or width == 0:
        return np.zeros((B, C), np.float32), np.zeros((B, 2), np.float32)
    base = np.int64(P["E"].shape[0] + 1)
    pos = base ** np.arange(width, dtype=np.int64)
    digits = table.astype(np.int64) + 1                   # 0 past a chain's end
    whole = (digits * pos).sum(1)
    prefixes = np.unique(np.concatenate([(digits[:, :n] * pos[:n]).sum(1)
                                         for n in range(1, width + 1)]))
    L = min(paths.shape[1], width)
    code = ((paths[:, :L] + 1) * pos[:L]).sum(1)
    walked = (depth > 0) & (depth <= width)
    complete = np.isin(code, whole) & walked
    fits = depth < width
    nxt = code[:, None] + (slots.astype(np.int64) + 1) * pos[np.minimum(depth, width - 1)][:, None]
    on = np.isin(nxt, prefixes) & mask & fits[:, None]
    midway = np.isin(code, prefixes) & walked & ~complete & on.any(1)
    return on.astype(np.float32), np.stack([complete, midway], 1).astype(np.float32)


def mark_stops(fetches: list, chain_names: list) -> None:
    """Say, per fetch of an answer (dicts as ``ask`` gives them), whether STOP was offered at
    that decision (``stop_offered``): it is not midway along a chain the training questions
    are answered by (``chain_marks``), which the fetched path shows when the fetch went on
    along one (``midway_along``: those chains, as ``Policy.chain_names`` names them)."""
    whole = set(chain_names)
    path = ""
    for f in fetches:
        label = f["relation"] + (" (reversed)" if f["direction"] == "inverse" else "")
        step = f"{path} > {label}" if path else label
        along = sorted(c for c in whole if c == step or c.startswith(step + " > "))
        midway = bool(path) and path not in whole and bool(along)
        f["stop_offered"] = not midway
        if midway:
            f["midway_along"] = along
        path = step


def relation_slot(rel: np.ndarray, direction: np.ndarray, n_relations: int) -> np.ndarray:
    """Row of ``E`` for (relation, direction); relations unknown to the policy share the last row."""
    rel = np.asarray(rel, np.int64)
    slot = rel * 2 + np.asarray(direction, np.int64)
    return np.where((rel >= 0) & (rel < n_relations), slot, 2 * n_relations)


def candidate_repr(P: dict, ops, fact_vecs, inv, rel_vecs, rel, direction, slot, ent=None):
    """c_a for a flat list of N candidates.

    fact_vecs [U, D] are the distinct fetchable facts' text vectors and ``inv`` [N] picks each
    candidate's row; rel_vecs [R, D] are the relation-name vectors, ``rel`` [N] the candidate's
    relation row, ``direction`` [N] 0/1, ``slot`` [N] its row of ``E``, ``ent`` [N] the row of
    ``N_c`` of the entity it leads to (None: the shared row).  Returns [N, H].
    """
    fv = (fact_vecs @ P["W_v"])[ops.asarray(inv)]
    rel, direction = ops.asarray(rel), ops.asarray(direction)
    u = ops.where(direction[:, None] == 0, (rel_vecs @ P["W_u"][0])[rel],
                  (rel_vecs @ P["W_u"][1])[rel])
    n_c = P["N_c"][ops.asarray(ent)] if ent is not None else P["N_c"][-1]
    return ops.tanh(fv + u + P["E"][ops.asarray(slot)] + P["b_c"] + n_c)


class Reprs:
    """Candidate representations c_a kept for the real candidates only (no padding rows).

    A batch pads every walker to the longest candidate list; on dense graphs (UMLS: degree 20
    to 320) most of a padded [B, C, H] block would be padding, computed and differentiated for
    nothing.  ``flat`` [M, H] holds the real ones, ``at`` [M] their flat place in [B * C] and
    ``pos`` [B, C] each place's row of ``flat`` (-1: padding).  ``reprs[i, j]`` reads like the
    padded block would.
    """

    def __init__(self, ops, flat, at, shape):
        self.ops, self.flat, self.at = ops, flat, np.asarray(at, np.int64)
        pos = np.full(shape[0] * shape[1], -1, np.int64)
        pos[self.at] = np.arange(len(self.at))
        self.pos = pos.reshape(shape)
        self.rows = self.at // shape[1]          # the walker of each real candidate
        self.shape = (shape[0], shape[1], flat.shape[-1])

    def __getitem__(self, key):
        key = key if isinstance(key, tuple) else (key,)
        key = tuple(k if isinstance(k, slice) else np.asarray(k) for k in key)
        return self.flat[self.ops.asarray(self.pos[key])]


def scores(P: dict, ops, x, h, here, qrel, hop, cand, feats, mask, stop_feats, here_row=None,
           start_row=None, known=None, chain=None):
    """Log-probabilities over [STOP, candidates...] for a batch of walkers.

    x [B, X] (from ``question_features``), h [B, H], here [B, D] (the vector of the entity each walker stands on), qrel [B]
    (row of ``Q``: the asked relation, the last row for questions in words), hop [B] int, cand [B, C, H] (from ``candidate_repr``), feats [B, C, F], mask [B, C] bool
    (False = padding), stop_feats [B, G], here_row / start_row [B] (rows of ``N_z`` / ``N_s``:
    where each walker stands / started; None: the shared row), known: (k_a [B, C], k_0 [B]),
    1 where a candidate leads to / the walker stands on an answer a visible fact already states
    (completion questions; None: none), chain: (l_a [B, C], l_0 [B, 2]) from ``chain_marks``
    (None: none; l_0[:, 1] = 1 takes STOP away)  ->  log pi [B, 1 + C].
    """
    n_z = P["N_z"][ops.asarray(here_row)] if here_row is not None else P["N_z"][-1]
    n_z = n_z + (P["N_s"][ops.asarray(start_row)] if start_row is not None else P["N_s"][-1])
    z = ops.tanh(x @ P["W_q"] + h @ P["W_h"] + here @ P["W_e"] + P["Q"][ops.asarray(qrel)]
                 + P["b_hop"][ops.asarray(hop)] + n_z)
    if isinstance(cand, Reprs):  # real candidates only, scattered into the padded [B, C]
        B, C, H = cand.shape
        s_real = (cand.flat * z[ops.asarray(cand.rows)]).sum(-1) / np.sqrt(H)
        s = ops.scatter(B * C, cand.at, s_real, NEG).reshape(B, C) + feats @ P["w_f"]
    else:
        s = (cand * z[:, None, :]).sum(-1) / np.sqrt(cand.shape[-1]) + feats @ P["w_f"]
    s_stop = ((z * P["w_stop"]).sum(-1, keepdims=True) + (x * P["u_stop"][ops.asarray(hop)]).sum(-1, keepdims=True)
              + stop_feats @ P["w_g"][:, None] + P["b_stop"])
    if known is not None:  # weights per hop
        wk = P["w_known"][ops.asarray(hop)]
        s = s + ops.asarray(known[0]) * wk[:, 0:1]
        s_stop = s_stop + ops.asarray(known[1])[:, None] * wk[:, 1:2]
    if chain is not None:  # weights per hop
        wc = P["w_chain"][ops.asarray(hop)]
        s = s + ops.asarray(chain[0]) * wc[:, 0:1]
        s_stop = s_stop + ops.asarray(chain[1][:, :1]) * wc[:, 1:2]
        s_stop = ops.where(ops.asarray(chain[1][:, 1:] > 0), NEG, s_stop)
    s = ops.where(ops.asarray(mask), s, NEG)
    return ops.log_softmax(ops.cat([s_stop, s], axis=1))


def next_memory(P: dict, ops, h, chosen):
    """h_{t+1} from h_t and the representation of the fetched fact."""
    return ops.tanh(h @ P["U_h"] + chosen @ P["U_c"])


class Policy:
    """A trained policy: numpy weights plus the settings needed to use them."""

    def __init__(self, params: dict, settings: dict, version: int | None = None,
                 scores_: dict | None = None, members: list | None = None):
        self.params = {k: np.asarray(v, np.float32) for k, v in params.items()}
        # every member's weights, the first being ``params`` itself (the kept scorer lives there)
        self.members = [self.params] + [{k: np.asarray(v, np.float32) for k, v in m.items()}
                                        for m in (members or [])]
        self.settings = dict(settings)
        self.version = version
        self.scores = dict(scores_ or {})
        self.relations = list(settings.get("relations", []))
        self._rel_index = {r: i for i, r in enumerate(self.relations)}

    @property
    def max_hops(self) -> int:
        return int(self.settings.get("max_hops", 4))

    @property
    def threshold(self) -> float:
        return float(self.settings.get("threshold", 0.0))

    def entity_map(self, graph_entities: list[str], key: str = "entities") -> np.ndarray | None:
        """Graph entity index -> row of the learned entity vectors (None when it has none);
        ``key="scorer_entities"``: row of the kept scorer's entities.  An entity unknown at
        training time maps to the row after the last."""
        names = self.settings.get(key)
        if not names:
            return None
        index = {n: i for i, n in enumerate(names)}
        return np.array([index.get(n, len(names)) for n in graph_entities], np.int64)

    def chain_names(self) -> list[str]:
        """The relation chains the policy walks along, readable: "made by > based in" (a
        relation walked from object to subject is marked "(reversed)")."""
        table = self.params.get("chains", np.zeros((0, 0)))
        return [" > ".join(self.relations[int(k) // 2] + (" (reversed)" if int(k) % 2 else "")
                           for k in row if k >= 0 and int(k) // 2 < len(self.relations))
                for row in table]

    def relation_map(self, graph_relations: list[str]) -> np.ndarray:
        """Graph relation index -> the policy's relation index (-1: unknown to the policy)."""
        return np.array([self._rel_index.get(r, -1) for r in graph_relations], np.int64)

    # -- storage: plain float32 blobs, never pickle ----------------------------------------
    def save(self, con, version: int, created_at, active: bool = True) -> None:
        import json

        if active:
            con.execute("UPDATE policies SET active = false WHERE active")
        con.execute("INSERT INTO policies VALUES (?, ?, ?, 'hopper-policy/1', ?, ?, ?)",
                    [version, created_at, active, self.settings.get("model", ""),
                     json.dumps(self.settings), json.dumps(self.scores)])
        for m, params in enumerate(self.members):
            for name, arr in params.items():
                arr = np.ascontiguousarray(arr, dtype="<f4")
                con.execute("INSERT INTO policy_tensors VALUES (?, ?, ?, 'float32-le', ?)",
                            [version, f"m{m}.{name}" if m else name, list(arr.shape), arr.tobytes()])
        self.version = version

    @classmethod
    def read(cls, con, version: int | None = None, known: dict | None = None) -> "Policy | None":
        """The active policy (or ``version``).  ``known`` holds policies read before, keyed
        by version and settings (which name the training run): a stored policy never changes,
        so one found there is not read again (a replaced store's "v1" is another key)."""
        import json

        from .store import first

        if version is None:
            row = first(con.execute("SELECT version, settings, scores FROM policies WHERE active "
                              "ORDER BY version DESC LIMIT 1"))
        else:
            row = first(con.execute("SELECT version, settings, scores FROM policies WHERE version = ?",
                              [version]))
        if row is None:
            return None
        key = (row[0], row[1])
        if known is not None and key in known:
            return known[key]
        by_member: dict = {}
        for name, shape, dtype, data in con.execute(
                "SELECT name, shape, dtype, data FROM policy_tensors WHERE version = ?",
                [row[0]]).fetchall():
            if dtype != "float32-le":
                raise ValueError(f"policy tensor {name}: unknown dtype {dtype}")
            m, _, rest = name.partition(".")  # "m2.W_h": the third member's; "W_h": the first's
            m, name = (int(m[1:]), rest) if rest and m[:1] == "m" and m[1:].isdigit() else (0, name)
            by_member.setdefault(m, {})[name] = \
                np.frombuffer(data, dtype="<f4").reshape(shape).astype(np.float32)
        for params in by_member.values():
            _fill_older(params)
        params = by_member.get(0, {})
        missing = set(PARAM_SHAPES) - set(params)
        if missing:
            from .errors import InputError
            raise InputError(f"policy v{row[0]} was made by another version of hopper (it lacks "
                             f"{', '.join(sorted(missing))})", hint="train a new policy")
        policy = cls(params, json.loads(row[1]), version=row[0], scores_=json.loads(row[2] or "{}"),
                     members=[by_member[m] for m in sorted(by_member) if m])
        if known is not None:
            known[key] = policy
        return policy


def _fill_older(params: dict) -> None:
    """Give a policy stored by an older hopper the arrays it lacks, set so they change nothing."""
    if "w_vocab" not in params and "q_proj" in params:  # made before policies read words
        dim = params["q_proj"].shape[0]
        params |= {"w_vocab": np.zeros((0, dim), np.float32),
                   "w_mean": np.zeros(0, np.float32), "w_scale": np.zeros(0, np.float32)}
    if "N_c" not in params and "W_h" in params:  # made before policies could learn entities
        hid = params["W_h"].shape[0]
        params |= {k: np.zeros((1, hid), np.float32) for k in ("N_c", "N_z", "N_s")}
    if "b_hop" in params:
        T = params["b_hop"].shape[0]
        if "w_known" not in params:  # made before policies saw stated answers
            params["w_known"] = np.zeros((T, 2), np.float32)
        if "chains" not in params:  # made before policies knew the questions' chains
            params |= {"chains": np.zeros((0, T - 1), np.float32),
                       "w_chain": np.zeros((T, 2), np.float32)}


def mixture_step(members: list, ops, graph, relmap: np.ndarray, xs: list, hs: list, hop,
                 batch: dict, **kw):
    """``step`` for an ensemble: log of the members' mean probabilities [B, 1 + C], and each
    member's candidate representations (for its own ``next_memory``).  One member: ``step``
    itself, number for number."""
    outs = [step(P, ops, graph, relmap, x, h, hop, batch, **kw) for P, x, h in zip(members, xs, hs)]
    if len(outs) == 1:
        return outs[0][0], [outs[0][1]]
    lps = np.stack([lp for lp, _ in outs])
    top = lps.max(0)
    return (top + np.log(np.exp(lps - top).mean(0))).astype(lps.dtype), [c for _, c in outs]


def step(P: dict, ops, graph, relmap: np.ndarray, x, h, hop, batch: dict, qrel=None,
         entmap: np.ndarray | None = None, start=None, stated=None):
    """Score one hop for a batch of walkers: (log pi [B, 1 + C], candidate reprs [B, C, H] as
    ``Reprs``).

    ``batch`` comes from ``env.pad_candidates``; ``relmap`` maps the graph's relations to the
    policy's; ``qrel`` [B] is the policy's index of each walker's asked relation (-1: none);
    ``entmap`` maps the graph's entities to rows of the learned entity vectors (None: the policy
    has none), ``start`` [B] is where each walker started (graph index; None: not given);
    ``stated`` [B] is each walker's set of answers a visible fact already states (completion
    questions; None: none).  Training (torch) and search (numpy) both call this, so they share
    every number.
    """
    facts = batch["facts"]
    B, C = facts.shape
    flat = facts.reshape(-1)
    real = flat >= 0
    at = np.flatnonzero(real)
    rf = flat[at]
    uniq, inv = np.unique(rf, return_inverse=True)
    fv = ops.asarray(np.asarray(graph.fact_vecs[uniq], np.float32))
    rv = ops.asarray(np.asarray(graph.relation_vecs, np.float32))
    rel = graph.rel[rf].astype(np.int64)
    dirs = batch["dirs"].reshape(-1)[at].astype(np.int64)
    slot = relation_slot(relmap[rel] if len(relmap) else np.full_like(rel, -1), dirs,
                         (P["E"].shape[0] - 1) // 2)
    ent = here_row = start_row = None
    if entmap is not None:
        if start is not None:
            start_row = entmap[np.asarray(start, np.int64)]
        nxt = np.where(dirs == 0, graph.obj[rf], graph.subj[rf])
        ent = entmap[nxt.astype(np.int64)]
        here_row = entmap[np.asarray(batch["here"], np.int64)]
    cand = Reprs(ops, candidate_repr(P, ops, fv, inv.reshape(-1), rv, rel, dirs, slot, ent),
                 at, (B, C))
    here = ops.asarray(np.asarray(graph.entity_vecs[batch["here"]], np.float32))
    n_q = P["Q"].shape[0] - 1
    qrel = np.full(B, -1) if qrel is None else np.asarray(qrel, np.int64)
    qrel = np.where((qrel >= 0) & (qrel < n_q), qrel, n_q)
    known = None
    if stated is not None and any(stated):
        k_c = np.zeros(B * C, np.float32)
        nexts = np.where(dirs == 0, graph.obj[rf], graph.subj[rf])
        k_c[at] = [int(n) in stated[i] for i, n in zip(at // C, nexts)]
        k_0 = np.array([int(e) in st for e, st in zip(batch["here"], stated)], np.float32)
        known = (k_c.reshape(B, C), k_0)
    chain = None
    if P["chains"].shape[0] and "paths" in batch:
        slots = np.full(B * C, -1, np.int64)
        slots[at] = slot
        kinds = pad_rows(batch["paths"])                 # the graph's kinds, -1 padding
        prel = relmap[np.maximum(kinds, 0) // 2] if len(relmap) else np.full(kinds.shape, -1)
        paths = np.where(kinds >= 0, relation_slot(prel, kinds % 2, (P["E"].shape[0] - 1) // 2),
                         -1)
        chain = chain_marks(P, slots.reshape(B, C), paths, np.asarray(batch["mask"]))
    logp = scores(P, ops, x, h, here, qrel, ops.asarray(hop), cand, ops.asarray(batch["feats"]),
                  ops.asarray(batch["mask"]), ops.asarray(batch["stop_feats"]), here_row,
                  start_row, known, chain)
    return logp, cand
