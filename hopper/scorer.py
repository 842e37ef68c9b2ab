"""A one-hop scorer for reward shaping: ComplEx over (start, asked relation, answer).

Multi-hop walkers trained by REINFORCE learn slowly when a walk earns nothing unless it ends
exactly on a known answer.  Lin, Socher & Xiong (EMNLP 2018) shape the reward with a one-hop
knowledge-graph embedding model trained on the same training facts: a walk that ends on a
wrong entity earns the model's probability that the entity answers the query, instead of 0.

The model here is ComplEx (Trouillon et al. 2016): entities and relations are complex vectors
and  score(s, r, o) = Re(<e_s, w_r, conj(e_o)>).  It is trained with 1-N scoring (every
entity scored at once for a (start, relation) query) and binary cross-entropy with label
smoothing, on the training questions' (start, asked relation, answers), so an inverse asked
relation is simply its own relation row (the "reciprocal" set-up).  Training uses torch; the
fitted scorer is plain numpy.  The policy keeps it and weighs completion answers by it where
that measured better on the validation questions (``hopper.search.weigh_by_scorer``).
"""
from __future__ import annotations

import numpy as np


class Scorer:
    """A fitted ComplEx scorer: ``probs(starts, relations)`` -> sigmoid scores [B, entities]."""


    def __init__(self, ent: np.ndarray, rel: np.ndarray):
        self.ent = np.asarray(ent, np.float32)   # [N, 2k]: real parts, then imaginary parts
        self.rel = np.asarray(rel, np.float32)   # [R, 2k]

    def logits(self, starts, relations) -> np.ndarray:
        k = self.ent.shape[1] // 2
        s = self.ent[np.asarray(starts, np.int64)]
        r = self.rel[np.asarray(relations, np.int64)]
        sr, si, rr, ri = s[:, :k], s[:, k:], r[:, :k], r[:, k:]
        return (sr * rr - si * ri) @ self.ent[:, :k].T + (sr * ri + si * rr) @ self.ent[:, k:].T

    def probs(self, starts, relations) -> np.ndarray:
        return 1.0 / (1.0 + np.exp(-self.logits(starts, relations)))

    def probs_of(self, start: int, relation: int, answers) -> np.ndarray:
        """The probabilities of some ``answers`` (entity rows) only, for one query: [A]."""
        k = self.ent.shape[1] // 2
        s, r, o = self.ent[start], self.rel[relation], self.ent[np.asarray(answers, np.int64)]
        sr, si, rr, ri = s[:k], s[k:], r[:k], r[k:]
        logits = o[:, :k] @ (sr * rr - si * ri) + o[:, k:] @ (sr * ri + si * rr)
        return 1.0 / (1.0 + np.exp(-logits))


def fit_scorer(queries: list, n_entities: int, n_relations: int, epochs: int = 600,
               dim: int = 200, lr: float = 0.003, batch: int = 128, smoothing: float = 0.2,
               dropout: float = 0.3, seed: int = 0, log=None) -> Scorer:
    """Fit ComplEx on ``queries``: [(start entity, relation, {answer entities})]."""
    import torch

    threads = torch.get_num_threads()
    torch.set_num_threads(1)  # tiny tensors; more threads only wait for each other on 2 cores
    try:
        return _fit(torch, queries, n_entities, n_relations, epochs, dim, lr, batch, smoothing,
                    dropout, seed, log)
    finally:
        torch.set_num_threads(threads)


def _fit(torch, queries, n_entities, n_relations, epochs, dim, lr, batch, smoothing, dropout,
         seed, log) -> Scorer:
    g = torch.Generator().manual_seed(seed)
    starts = torch.as_tensor([q[0] for q in queries], dtype=torch.long)
    rels = torch.as_tensor([q[1] for q in queries], dtype=torch.long)
    target = torch.zeros(len(queries), n_entities)
    for i, q in enumerate(queries):
        target[i, list(q[2])] = 1.0
    target = target * (1 - smoothing) + smoothing / n_entities
    ent = torch.nn.Parameter(torch.randn(n_entities, 2 * dim, generator=g) * 0.1)
    rel = torch.nn.Parameter(torch.randn(n_relations, 2 * dim, generator=g) * 0.1)
    opt = torch.optim.Adam([ent, rel], lr=lr)
    drop = torch.nn.Dropout(dropout)
    for epoch in range(epochs):
        order = torch.randperm(len(queries), generator=g)
        total = 0.0
        for i in range(0, len(order), batch):
            idx = order[i:i + batch]
            s, r, e = drop(ent[starts[idx]]), rel[rels[idx]], ent
            sr, si, rr, ri = s[:, :dim], s[:, dim:], r[:, :dim], r[:, dim:]
            logits = (sr * rr - si * ri) @ e[:, :dim].T + (sr * ri + si * rr) @ e[:, dim:].T
            loss = torch.nn.functional.binary_cross_entropy_with_logits(logits, target[idx])
            opt.zero_grad()
            loss.backward()
            opt.step()
            total += float(loss.detach()) * len(idx)
        if log and (epoch + 1) % 50 == 0:
            log(f"scorer epoch {epoch + 1}: loss {total / len(queries):.4f}")
    return Scorer(ent.detach().numpy(), rel.detach().numpy())
