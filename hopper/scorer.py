"""A one-hop scorer for reward shaping: ComplEx over (start, asked relation, answer).

Multi-hop walkers trained by REINFORCE learn slowly when a walk earns nothing unless it ends
exactly on a known answer.  Lin, Socher & Xiong (EMNLP 2018) shape the reward with a one-hop
knowledge-graph embedding model trained on the same training facts: a walk that ends on a
wrong entity earns the model's probability that the entity answers the query, instead of 0.

The model here is ComplEx (Trouillon et al. 2016): entities and relations are complex vectors
and  score(s, r, o) = Re(<e_s, w_r, conj(e_o)>).  It is trained with 1-N scoring (every
entity scored at once for a (start, relation) query) on the training questions' (start, asked
relation, answers), so an inverse asked relation is simply its own relation row (the
"reciprocal" set-up; the completion benchmarks ask every train fact both ways).  By default
the loss is the softmax cross-entropy over all entities with the N3 regulariser of Lacroix,
Usunier & Obozinski (ICML 2018, from memory), probabilities a softmax over the entities; the
earlier binary cross-entropy with label smoothing (a sigmoid per entity) is ``loss="bce"``.
On Kinship's validation split the first reached 0.55-0.59 filtered Hits@1 against 0.51 (two
seeds each; DEVELOPERS.md).  Training uses torch; the
fitted scorer is plain numpy.  The policy keeps it and weighs completion answers by it where
that measured better on the validation questions (``hopper.search.weigh_by_scorer``).
"""
from __future__ import annotations

import numpy as np


LOSSES = ("bce", "softmax")  # how a scorer was fitted, and so how its scores become probabilities


class Scorer:
    """A fitted ComplEx scorer: ``probs(starts, relations)`` -> [B, entities]: a sigmoid per
    entity when fitted with ``loss="bce"``, a softmax over the entities with ``"softmax"``."""

    def __init__(self, ent: np.ndarray, rel: np.ndarray, loss: str = "bce"):
        self.ent = np.asarray(ent, np.float32)   # [N, 2k]: real parts, then imaginary parts
        self.rel = np.asarray(rel, np.float32)   # [R, 2k]
        self.loss = loss

    def logits(self, starts, relations) -> np.ndarray:
        k = self.ent.shape[1] // 2
        s = self.ent[np.asarray(starts, np.int64)]
        r = self.rel[np.asarray(relations, np.int64)]
        sr, si, rr, ri = s[:, :k], s[:, k:], r[:, :k], r[:, k:]
        return (sr * rr - si * ri) @ self.ent[:, :k].T + (sr * ri + si * rr) @ self.ent[:, k:].T

    def probs(self, starts, relations) -> np.ndarray:
        logits = self.logits(starts, relations)
        if self.loss == "softmax":
            e = np.exp(logits - logits.max(1, keepdims=True))
            return e / e.sum(1, keepdims=True)
        return 1.0 / (1.0 + np.exp(-logits))

    def probs_of(self, start: int, relation: int, answers) -> np.ndarray:
        """The probabilities of some ``answers`` (entity rows) only, for one query: [A]."""
        answers = np.asarray(answers, np.int64)
        if self.loss == "softmax":  # the normaliser needs every entity
            return self.probs([start], [relation])[0, answers]
        k = self.ent.shape[1] // 2
        s, r, o = self.ent[start], self.rel[relation], self.ent[answers]
        sr, si, rr, ri = s[:k], s[k:], r[:k], r[k:]
        logits = o[:, :k] @ (sr * rr - si * ri) + o[:, k:] @ (sr * ri + si * rr)
        return 1.0 / (1.0 + np.exp(-logits))


def fit_scorer(queries: list, n_entities: int, n_relations: int, epochs: int = 100,
               dim: int = 200, lr: float = 0.01, batch: int = 256, smoothing: float = 0.0,
               dropout: float = 0.3, loss: str = "softmax", n3: float = 0.01, seed: int = 0,
               log=None) -> Scorer:
    """Fit ComplEx on ``queries``: [(start entity, relation, {answer entities})].

    ``loss="bce"``: one row per query, every answer a positive of a sigmoid per entity (label
    ``smoothing``).  ``loss="softmax"``: one row per (query, answer), cross-entropy of a
    softmax over all entities (the "1-vs-all" loss of Lacroix, Usunier & Obozinski, ICML 2018,
    from memory), the other answers of the query left in the denominator as they do.
    ``n3`` weighs their nuclear 3-norm regulariser (``n3_penalty``) of each (start, relation,
    answer) row; the bce rows have no single answer, and ``n3`` is not used with them."""
    import torch

    if loss not in LOSSES:
        raise ValueError(f"loss must be one of {LOSSES}, not {loss!r}")
    threads = torch.get_num_threads()
    torch.set_num_threads(1)  # tiny tensors; more threads only wait for each other on 2 cores
    try:
        return _fit(torch, queries, n_entities, n_relations, epochs, dim, lr, batch, smoothing,
                    dropout, loss, n3, seed, log)
    finally:
        torch.set_num_threads(threads)


def n3_penalty(s, r, o, dim: int):
    """The N3 regulariser of Lacroix et al. (ICML 2018, eq. for ComplEx, from memory): the sum
    over a batch of |e_s|^3 + |w_r|^3 + |e_o|^3 taken per complex coordinate (|x| the modulus),
    divided by the batch size.  Rows are [real parts, imaginary parts]; works on numpy arrays
    and torch tensors alike."""
    def cubed_moduli(x):
        return ((x[:, :dim] ** 2 + x[:, dim:] ** 2) ** 1.5).sum()
    return (cubed_moduli(s) + cubed_moduli(r) + cubed_moduli(o)) / s.shape[0]


def _fit(torch, queries, n_entities, n_relations, epochs, dim, lr, batch, smoothing, dropout,
         loss, n3, seed, log) -> Scorer:
    g = torch.Generator().manual_seed(seed)
    if loss == "softmax":  # a row per (query, answer)
        rows = [(q[0], q[1], a) for q in queries for a in sorted(q[2])]
        answers = torch.as_tensor([row[2] for row in rows], dtype=torch.long)
    else:
        rows = queries
        target = torch.zeros(len(rows), n_entities)
        for i, q in enumerate(rows):
            target[i, list(q[2])] = 1.0
        target = target * (1 - smoothing) + smoothing / n_entities
    starts = torch.as_tensor([q[0] for q in rows], dtype=torch.long)
    rels = torch.as_tensor([q[1] for q in rows], dtype=torch.long)
    ent = torch.nn.Parameter(torch.randn(n_entities, 2 * dim, generator=g) * 0.1)
    rel = torch.nn.Parameter(torch.randn(n_relations, 2 * dim, generator=g) * 0.1)
    opt = torch.optim.Adam([ent, rel], lr=lr)
    drop = torch.nn.Dropout(dropout)
    for epoch in range(epochs):
        order = torch.randperm(len(rows), generator=g)
        total = 0.0
        for i in range(0, len(order), batch):
            idx = order[i:i + batch]
            s, r, e = drop(ent[starts[idx]]), rel[rels[idx]], ent
            sr, si, rr, ri = s[:, :dim], s[:, dim:], r[:, :dim], r[:, dim:]
            logits = (sr * rr - si * ri) @ e[:, :dim].T + (sr * ri + si * rr) @ e[:, dim:].T
            if loss == "softmax":
                cost = torch.nn.functional.cross_entropy(logits, answers[idx],
                                                         label_smoothing=smoothing)
                if n3:
                    cost = cost + n3 * n3_penalty(ent[starts[idx]], r, ent[answers[idx]], dim)
            else:
                cost = torch.nn.functional.binary_cross_entropy_with_logits(logits, target[idx])
            opt.zero_grad()
            cost.backward()
            opt.step()
            total += float(cost.detach()) * len(idx)
        if log and (epoch + 1) % 50 == 0:
            log(f"scorer epoch {epoch + 1}: loss {total / len(rows):.4f}")
    return Scorer(ent.detach().numpy(), rel.detach().numpy(), loss)
