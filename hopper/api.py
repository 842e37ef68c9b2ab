"""The Python API: a store handle with the verbs load, info, train, ask, ask_many, evaluate, audit."""
from __future__ import annotations

import datetime as _dt
import json
import time
import uuid
from pathlib import Path

import numpy as np

from .errors import InputError
from .questions import Question, check_text, make_question, read_questions
from .store import Store, first

STRATEGIES = ("policy", "greedy", "walk")
CAUTION = ("hopper's answers are only as good as the loaded facts and the trained policy; "
           "check the facts behind an answer before relying on it for anything consequential.")


def _now() -> _dt.datetime:
    return _dt.datetime.now(_dt.timezone.utc).replace(tzinfo=None)


def _check_choice(name, value, choices):
    if value not in choices:
        raise InputError(f"must be one of {', '.join(choices)} (got {value!r})", field=name)


def _check_bool(name, value):
    if not isinstance(value, (bool, np.bool_)):
        raise InputError(f"must be True or False (got {value!r})", field=name)


def _fingerprint(cfg, qs, vs, facts_version: int) -> dict:
    """What a resumed training run must share with the interrupted one (see ``Hopper.train``).

    The settings as they are (the time budget may change), the questions as digests.
    """
    import hashlib
    from dataclasses import asdict

    def digest(questions):
        rows = [[q.text, q.answers, q.subject, q.relation] for q in questions]
        return hashlib.sha256(json.dumps(rows, ensure_ascii=False).encode("utf-8")).hexdigest()

    settings = {k: v for k, v in asdict(cfg).items() if k not in ("time_budget", "workers")}
    return {"settings": settings, "questions": digest(qs), "valid": digest(vs),
            "facts_version": int(facts_version)}


def _use_checkpoint_vectors(checkpoint, eps: list, where) -> None:
    """Give the episodes the very question vectors the interrupted run began with."""
    from .policy import PARAM_SHAPES

    arrays, meta = checkpoint
    qvec, qstate = arrays.get("episodes.qvec"), arrays.get("episodes.qstate")
    counts, wvecs = arrays.get("episodes.word_counts"), arrays.get("episodes.word_vecs")
    running = meta.get("member", 0) is not None  # None: only finished ensemble members in it
    if any(a is None or len(a) != len(eps) for a in (qvec, qstate, counts)) or wvecs is None or \
            int(counts.sum()) != len(wvecs) or (running and "vocabulary" not in meta) or \
            (running and any(f"param.{k}" not in arrays for k in PARAM_SHAPES)):
        raise InputError("the training checkpoint is incomplete or from another version of hopper",
                         file=str(where), hint="train without --resume to start again")
    ends = np.cumsum(counts)
    for e, v, q, a, b in zip(eps, qvec, qstate, ends - counts, ends):
        e.qvec, e.qstate = np.asarray(v, np.float32), np.asarray(q, np.float32)
        e.word_vecs = np.asarray(wvecs[a:b], np.float32)


def _check_int(name, value, lo, hi=None):
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < lo or \
            (hi is not None and value > hi):
        rng = f"from {lo} to {hi}" if hi is not None else f"at least {lo}"
        raise InputError(f"must be a whole number {rng} (got {value!r})", field=name)


class Hopper:
    """A hopper store.  ``Hopper(path)`` names it; ``load`` creates it.

    >>> hp = Hopper("demo.duckdb")
    >>> hp.load(["facts.csv"])                    # doctest: +SKIP
    >>> hp.train("train.jsonl", valid="valid.jsonl", seed=0)   # doctest: +SKIP
    >>> hp.ask("Who makes part KX-2041?")["answer"]             # doctest: +SKIP
    """

    def __init__(self, path=None):
        self.store = Store(path)
        self._graph = None
        self._encoder = None
        self._policies: dict = {}  # policies read, by version and settings (see Policy.read)

    @property
    def path(self) -> Path:
        return self.store.path

    def __repr__(self) -> str:
        return f"Hopper({str(self.path)!r})"

    # -- facts -------------------------------------------------------------------------------
    def load(self, files, skip_invalid: bool = False, progress: bool | None = None) -> dict:
        """Load fact tables (CSV, Parquet, JSON Lines); all or nothing unless ``skip_invalid``."""
        from .load import load

        # load makes its own encoder: the store's precision (int8 for a new store), not the
        # fp32 one questions need.
        report = load(self.store, files, skip_invalid=skip_invalid, progress=progress)
        self._graph = None
        try:  # make the fast question encoder now, while torch is loaded anyway
            from . import embed
            embed.ensure_fast_model()
        except Exception:  # noqa: BLE001 - ask falls back to the reference encoder
            pass
        if report.facts_added:
            # Build the graph cache and the dense index now, so the next `ask` only reads them.
            try:
                self._graph_now(build_index=True)
            except Exception:  # noqa: BLE001 - ask builds the cache itself and scans exactly
                self._graph = None
        return report.as_dict()

    def info(self) -> dict:
        """Counts of facts, entities, relations and runs; the model; the active policy."""
        return self.store.info()

    # -- shared pieces ---------------------------------------------------------------------------
    def _graph_now(self, build_index: bool = False, also=None):
        """The current graph; ``build_index`` also fits the dense index if missing (sklearn).

        ``also(con)``, when given, runs on the connection that reads the graph in a fresh
        process (``ask`` reads the policy there: one DuckDB open fewer per cold answer).
        """
        from .env import Graph

        if self._graph is None:  # a fresh process: one connection reads version and arrays
            self._graph = Graph.from_store(self.store, build_index=build_index, also=also)
            return self._graph
        with self.store.connect() as con:
            version = int(Store.get_meta(con, "facts_version", "0"))
            if also is not None:
                also(con)
        if self._graph.facts_version != version or (build_index and self._graph.ivf is None):
            self._graph = Graph.from_store(self.store, build_index=build_index)
        return self._graph

    def _policy(self, version=None, required=True, con=None):
        from .policy import Policy

        if con is None:
            with self.store.connect() as c:
                policy = Policy.read(c, version, known=self._policies)
        else:
            policy = Policy.read(con, version, known=self._policies)
        if policy is None and required:
            raise InputError("the store has no trained policy", file=str(self.path),
                             hint="run 'hopper train --questions FILE', or use --strategy greedy or walk")
        return policy

    def _baseline_settings(self, con=None):
        """The active policy, if readable, only for the baselines' tuned hop counts."""
        try:
            return self._policy(required=False, con=con)
        except InputError:
            return None

    def _graph_and_policy(self, strategy: str):
        """The graph and the policy ``strategy`` needs, read on one connection."""
        got: dict = {}

        def read_policy(con):
            try:
                got["policy"] = (self._policy(con=con) if strategy == "policy"
                                 else self._baseline_settings(con=con))
            except InputError as e:
                got["error"] = e

        graph = self._graph_now(also=read_policy)
        if "error" in got:
            raise got["error"]
        return graph, got["policy"]

    def _questions(self, questions, need_answer=True) -> list[Question]:
        if isinstance(questions, (str, Path)):
            return read_questions(questions, need_answer=need_answer)
        out = []
        for i, q in enumerate(questions, start=1):
            if isinstance(q, Question):
                out.append(q)
            elif isinstance(q, str):
                out.append(Question(check_text(q, line=i)))
            else:
                out.append(make_question(q, file="questions", line=i, need_answer=need_answer))
        if not out:
            raise InputError("no questions given", field="questions")
        return out

    def _encode(self, texts, few: bool = False):
        """Unit vectors of ``texts``; ``few``: an answer's texts (``ask``), which may run on an
        encoder made quickly for a few texts (see ``embed.FEW_TEXTS``).  Everything else
        (load, train, eval) runs on the pre-packed session, in every process alike."""
        from .embed import FEW_TEXTS

        texts = list(texts)
        few = few and len(texts) <= FEW_TEXTS
        return self._encoder_now(few=few).encode(texts, few=few)

    def _encode_few(self, texts):
        return self._encode(texts, few=True)

    def _encoder_now(self, few: bool = False):
        """The encoder, made at first use; ``few``: that first use encodes a few texts."""
        from . import embed

        if self._encoder is None:
            self._encoder = embed.Encoder("auto", few=few)
        return self._encoder

    # -- training --------------------------------------------------------------------------------
    def train(self, questions, valid=None, seed: int = 0, max_hops: int = 4,
              progress: bool | None = None, log=None, resume: bool = False, **settings) -> dict:
        """Train a policy by REINFORCE on question/answer pairs and store it as a new version.

        ``valid`` (a file or list) early-stops training and sets the abstention threshold;
        without it a tenth of ``questions`` is held out for that.  Returns a summary.

        After every epoch the training state is saved beside the store
        (``STORE.train-checkpoint.npz``); the active policy changes only when training ends.
        ``resume=True`` continues an interrupted run from that checkpoint; it needs the same
        questions, settings and facts, and ends with the same policy as an uninterrupted run.
        """
        from dataclasses import fields

        from . import train as tr
        from .env import episodes

        _check_int("seed", seed, 0)
        _check_int("max_hops", max_hops, 1, 8)
        _check_bool("resume", resume)
        known = {f.name for f in fields(tr.TrainSettings)}
        for k in settings:
            if k not in known:
                raise InputError(f"unknown training setting (known: {', '.join(sorted(known))})", field=k)
        cfg = tr.TrainSettings(seed=seed, max_hops=max_hops, **settings)
        cfg.validate()
        if resume and not self.store.checkpoint_path.exists():
            self.store.require()
            raise InputError("there is no unfinished training run to resume", file=str(self.path),
                             field="--resume", hint="train without --resume")
        qs = self._questions(questions)
        vs = self._questions(valid) if valid is not None else None
        if vs is None:
            rng = np.random.default_rng(seed)
            order = rng.permutation(len(qs))
            n_valid = max(1, len(qs) // 10) if len(qs) >= 10 else 0
            vs = [qs[i] for i in order[:n_valid]]
            qs = [qs[i] for i in order[n_valid:]]
        self.store.require()
        with self.store.connect() as con:
            facts_version = int(Store.get_meta(con, "facts_version", "0"))
        fingerprint = _fingerprint(cfg, qs, vs, facts_version)
        resume_from = self._resume_point(fingerprint) if resume else None
        graph = self._graph_now(build_index=True).in_memory()
        if graph.facts_version != facts_version:  # a load landed just now
            if resume:
                raise InputError("facts were loaded since the run was interrupted",
                                 file=str(self.path), field="--resume", hint="train without --resume")
            fingerprint["facts_version"] = graph.facts_version
        eps = episodes(graph, qs + vs, self._encode, hide_answers=True)
        if resume:
            _use_checkpoint_vectors(resume_from, eps, self.store.checkpoint_path)
            run = resume_from[1]["run"]
        else:
            resume_from, run = None, uuid.uuid4().hex
            if log and self.store.checkpoint_path.exists():
                log(f"starting afresh; the checkpoint of an unfinished run "
                    f"({self.store.checkpoint_path.name}) will be replaced")
        vectors = {"episodes.qvec": np.stack([e.qvec for e in eps]),
                   "episodes.qstate": np.stack([e.qstate for e in eps]),
                   "episodes.word_counts": np.array([len(e.word_vecs) for e in eps], np.int64),
                   "episodes.word_vecs": np.concatenate([e.word_vecs for e in eps])}

        def save(arrays, meta):
            self.store.save_checkpoint(arrays | vectors,
                                       meta | {"run": run, "fingerprint": fingerprint})

        train_eps = eps[:len(qs)]
        valid_eps = [e for e in eps[len(qs):] if e.starts and e.gold]
        policy, summary = tr.fit(graph, train_eps, valid_eps, cfg, progress=progress, log=log,
                                 save_checkpoint=save, resume_from=resume_from)
        summary["chains"] = policy.settings["chain_names"] = policy.chain_names()
        summary["baselines"] = self._tune_baselines(graph, valid_eps or train_eps[:200], max_hops)
        policy.settings.update(summary["baselines"])
        from . import embed
        policy.settings["model"] = embed.MODEL_NAME
        policy.settings["facts_version"] = graph.facts_version
        policy.settings["train_run"] = run
        with self.store.transaction() as con:
            version = first(con.execute("SELECT coalesce(max(version), 0) + 1 FROM policies"))[0]
            policy.save(con, version, _now())
        self.store.drop_checkpoint()  # the run is stored; nothing is left to resume
        summary["version"] = version
        summary["resumed"] = bool(resume)
        summary["curve_png"] = self._plot_curve(summary["curve"], version)
        return summary

    def _resume_point(self, fingerprint: dict) -> tuple[dict, dict]:
        """The checkpoint to resume from, checked against this run's settings, questions and facts."""
        cp = self.store.read_checkpoint()
        where = str(self.store.checkpoint_path)
        if cp is None:
            raise InputError("there is no unfinished training run to resume", file=str(self.path),
                             field="--resume", hint="train without --resume")
        arrays, meta = cp
        old = meta.get("fingerprint") or {}
        with self.store.connect() as con:
            done = first(con.execute("SELECT version FROM policies WHERE json_extract_string("
                                     "settings, '$.train_run') = ?", [str(meta.get("run"))]))
        if done:
            self.store.drop_checkpoint()
            raise InputError(f"the interrupted run had already finished as policy v{done[0]}",
                             file=where, field="--resume", hint="nothing is left to resume")
        for name, value in fingerprint["settings"].items():
            if name in old.get("settings", {}) and old["settings"][name] != value:
                raise InputError(f"the checkpoint was made with {old['settings'][name]!r}, this run "
                                 f"asks {value!r}", file=where, field=name,
                                 hint="resume with the settings of the interrupted run, or train "
                                      "without --resume")
        for key, what in (("questions", "training questions"), ("valid", "validation questions"),
                          ("facts_version", "facts"), ("settings", "settings")):
            if old.get(key) != fingerprint[key]:
                hint = ("facts were loaded since; train without --resume" if key == "facts_version"
                        else "resume with the same files and settings, or train without --resume")
                raise InputError(f"the {what} differ from those of the interrupted run",
                                 file=where, field=key, hint=hint)
        return arrays, meta

    def _tune_baselines(self, graph, eps, max_hops) -> dict:
        """Give each baseline its best fixed hop count on held-out questions (a fair comparison)."""
        from .search import greedy, walk
        from .train import hits_and_rank

        best = {}
        for name, fn in (("greedy_hops", greedy), ("walk_hops", walk)):
            scores = []
            for hops in range(1, max_hops + 1):
                hits = [hits_and_rank(fn(graph, e, hops=hops), e.gold)[0] for e in eps]
                scores.append((float(np.mean(hits)) if hits else 0.0, -hops))
            best[name] = -max(scores)[1]
        return best

    def _plot_curve(self, curve, version) -> str | None:
        try:
            import matplotlib
            matplotlib.use("Agg")
            import matplotlib.pyplot as plt
        except Exception:  # noqa: BLE001
            return None
        out = Path(str(self.path) + f".train-v{version}.png")
        fig, ax = plt.subplots(figsize=(6, 3.5))
        members = sorted({c.get("member", 1) for c in curve})
        for m in members:  # an ensemble's members one after the other, each its own line
            part = [c for c in curve if c.get("member", 1) == m]
            ep = [c["epoch"] for c in part]
            first = m == members[0]
            ax.plot(ep, [c["train_reward"] for c in part], marker="o", color="C0",
                    label="training reward (mean)" if first else None)
            ax.plot(ep, [c["valid_hits1"] for c in part], marker="s", color="C1",
                    label="validation Hits@1" if first else None)
        ax.set_xlabel("epoch" if len(members) == 1 else f"epoch ({len(members)} members, each from its first)")
        ax.set_ylim(0, 1.02)
        ax.set_title(f"hopper policy v{version}")
        ax.grid(alpha=0.3)
        ax.legend(loc="lower right")
        fig.tight_layout()
        import io

        from .files import write_atomic

        buf = io.BytesIO()
        try:
            fig.savefig(buf, format="png", dpi=100)
            write_atomic(out, buf.getvalue())  # renamed into place beside the store
        except OSError:
            return None
        finally:
            plt.close(fig)
        return str(out)

    # -- answering -------------------------------------------------------------------------------
    def ask(self, question: str | None = None, *, subject: str | None = None,
            relation: str | None = None, strategy: str = "policy", top: int = 10,
            record: bool = True) -> dict:
        """Answer one question (in words, or a subject/relation completion query)."""
        if question is None and subject is None:
            raise InputError("give a question, or subject and relation", field="question")
        obj = {"question": question} if question is not None else {}
        if subject is not None or relation is not None:
            obj.update(subject=subject, relation=relation)
        q = make_question(obj, file=None, line=None, need_answer=False)
        return self.ask_many([q], strategy=strategy, top=top, record=record)[0]

    def ask_many(self, questions, strategy: str = "policy", top: int = 10,
                 record: bool = True) -> list[dict]:
        """Answer many questions in one pass (one graph load, one encoder batch, one write)."""
        _check_choice("strategy", strategy, STRATEGIES)
        _check_int("top", top, 1, 1000)
        qs = self._questions(questions, need_answer=False)
        self.store.require()
        graph, policy = self._graph_and_policy(strategy)
        from .env import episodes

        eps = episodes(graph, qs, self._encode_few)
        return self._report(graph, policy, strategy,
                            self._solve_many(graph, policy, strategy, qs, eps, top=top), top, record)

    def rerun(self, question: str, *, subject: str | None = None, relation: str | None = None,
              strategy: str = "policy", policy_version: int | None = None,
              hidden_fact_ids=(), top: int = 10) -> dict:
        """Answer again without recording: for audits (replay, counterfactuals).

        ``policy_version`` picks a stored policy (default: the active one); facts whose ids
        are in ``hidden_fact_ids`` cannot be fetched.
        """
        _check_choice("strategy", strategy, STRATEGIES)
        obj = {"question": question}
        if subject is not None:
            obj.update(subject=subject, relation=relation)
        q = make_question(obj, need_answer=False)
        graph = self._graph_now()
        policy = self._policy(policy_version) if strategy == "policy" else \
            self._baseline_settings()
        from .env import episodes

        ep = episodes(graph, [q], self._encode_few)[0]
        ep.hidden = frozenset(r for r in (graph.fact_row(f) for f in hidden_fact_ids) if r is not None)
        t0 = time.perf_counter()
        out = self._solve(graph, policy, strategy, q, ep, top=top)
        return self._report(graph, policy, strategy, [(q, out, (time.perf_counter() - t0) * 1000)],
                            top, record=False)[0]

    @staticmethod
    def _beam(policy, top: int) -> int:
        """The beam width for an answer listing ``top`` ranked answers: the policy's own (16
        unless trained otherwise), widened to ``top``.  The beams are what ``ranked`` can
        list, so a narrower beam would cut a long ``--top`` short in a store with far more
        entities (16 beams reach about 36-64 answers on the demo store, 100 beams 120-263)."""
        return max(int(policy.settings.get("beam", 16)), int(top))

    def _solve_many(self, graph, policy, strategy, qs, eps, top: int = 10) -> list:
        """[(question, outcome, ms)] for many questions.  The policy searches them together
        (``search.beam_search_many``: one batch per hop for all questions; each question's
        ms is then its share of the whole), with the beam widened to ``top``; the baselines
        one by one."""
        if strategy != "policy":
            results = []
            for q, ep in zip(qs, eps):
                t0 = time.perf_counter()
                out = self._solve(graph, policy, strategy, q, ep)
                results.append((q, out, (time.perf_counter() - t0) * 1000))
            return results
        from .search import beam_search_many

        t0 = time.perf_counter()
        outs = beam_search_many(graph, policy, eps, beam=self._beam(policy, top))
        ms = (time.perf_counter() - t0) * 1000 / max(len(qs), 1)
        for q, ep, out in zip(qs, eps, outs):
            self._settle(policy, q, ep, out)
        return [(q, out, ms) for q, out in zip(qs, outs)]

    @staticmethod
    def _settle(policy, q: Question, ep, out) -> None:
        """Abstain below the policy's threshold; say why a completion subject is unknown."""
        if not out.abstained and out.confidence < policy.threshold:
            out.abstained = True
            out.reason = (f"confidence {out.confidence:.2f} is below the threshold "
                          f"{policy.threshold:.2f} set on the validation questions")
        if q.is_completion and not ep.starts:
            out.reason = f"the subject '{q.subject}' is not an entity of the store"

    def _solve(self, graph, policy, strategy, q: Question, ep, top: int = 10):
        from .search import beam_search, greedy, walk

        starts = ep.starts
        if strategy == "policy":
            out = beam_search(graph, policy, ep, beam=self._beam(policy, top))
            self._settle(policy, q, ep, out)
            return out
        if strategy == "greedy":
            hops = int(policy.settings.get("greedy_hops", 2)) if policy else 2
            out = greedy(graph, ep, hops=hops)
        else:
            hops = int(policy.settings.get("walk_hops", 2)) if policy else 2
            out = walk(graph, ep, hops=hops)
        if q.is_completion and not starts:
            out.reason = f"the subject '{q.subject}' is not an entity of the store"
        return out

    def _report(self, graph, policy, strategy, results, top, record) -> list[dict]:
        """Turn outcomes into the contract's JSON objects and record them as runs."""
        fact_rows = set()
        for _, out, _ in results:
            for f in out.fetches:
                fact_rows.add(f.fact)
                fact_rows.update(a for a, _ in f.alternatives if a is not None)
        ids = [int(graph.fact_ids[r]) for r in sorted(fact_rows)]

        def describe(con):
            if not ids:
                return {}
            rows = con.execute("SELECT fact_id, subject, relation, object, text, source, source_id "
                               "FROM facts WHERE fact_id IN (SELECT unnest(?::BIGINT[]))", [ids]).fetchall()
            return {r[0]: r for r in rows}

        docs, runs = [], []
        for q, out, ms in results:
            run_id = uuid.uuid4().hex[:16]
            names = graph.entity_names
            # six significant digits, not six decimals: small scores keep their order
            ranked = [{"answer": names[e], "score": float(f"{s:.6g}")} for e, s in out.ranked[:top]]
            answer = None if out.abstained or not out.ranked else names[out.ranked[0][0]]
            doc = {"run_id": run_id, "question": q.text, "answer": answer,
                   "confidence": round(float(out.confidence), 6), "abstained": bool(out.abstained or answer is None),
                   "ranked": ranked, "fetches": [], "strategy": strategy,
                   "policy_version": policy.version if policy else None,
                   "start_entities": [names[s] for s in out.starts]}
            if out.reason or doc["abstained"]:
                doc["reason"] = out.reason or "no answer"
            if q.is_completion:
                doc.update(subject=q.subject, relation=q.relation)
            docs.append(doc)
            runs.append((doc, out, ms))
        created = _now()

        from .policy import mark_stops

        def fill(con):
            info = describe(con)
            for doc, out, _ in runs:
                for f in out.fetches:
                    fid = int(graph.fact_ids[f.fact])
                    r = info.get(fid)
                    doc["fetches"].append({
                        "hop": f.hop + 1, "fact_id": fid, "subject": r[1], "relation": r[2],
                        "object": r[3], "text": r[4], "probability": round(f.probability, 6),
                        "direction": "forward" if f.direction == 0 else "inverse",
                        "from": graph.entity_names[f.from_entity] if f.from_entity >= 0 else None,
                        "to": graph.entity_names[f.to_entity], "source": r[5],
                        "alternatives": [_alternative(graph, info, a, p) for a, p in f.alternatives]})
                if strategy == "policy":  # where STOP was not offered, as the audit says it
                    mark_stops(doc["fetches"], policy.settings.get("chain_names", []))

        if not record:
            with self.store.connect() as con:
                fill(con)
        else:
            with self.store.transaction() as con:
                fill(con)
                _insert_runs(con, runs, created, graph.facts_version)
        for doc, _, ms in runs:
            doc["elapsed_ms"] = round(ms, 3)
        return docs

    # -- evaluation --------------------------------------------------------------------------------
    def evaluate(self, questions, strategies=STRATEGIES) -> dict:
        """Hits@1, MRR, mean fetches and ms per question for each strategy, on the same questions."""
        from threadpoolctl import threadpool_limits

        with threadpool_limits(limits=1, user_api="blas"):
            return self._evaluate(questions, strategies)

    def _evaluate(self, questions, strategies) -> dict:
        from .env import episodes
        from .train import hits_and_rank

        for s in strategies:
            _check_choice("strategy", s, STRATEGIES)
        qs = self._questions(questions)
        graph = self._graph_now()
        policy = self._policy() if "policy" in strategies else self._baseline_settings()
        eps = episodes(graph, qs, self._encode)
        table = {}
        for s in strategies:
            rows = []
            for (q, out, ms), e in zip(self._solve_many(graph, policy, s, qs, eps), eps):
                h1, rr = hits_and_rank(out, e.gold)
                rows.append((q.hops, h1, rr, out.n_fetches, ms, out.abstained))
            table[s] = _summarise(rows)
        return {"questions": len(qs), "strategies": table,
                "policy_version": policy.version if policy else None}

    # -- audit -----------------------------------------------------------------------------------------
    def audit(self, run_id: str) -> dict:
        """A recorded run, with its fetches and the alternatives passed over at each hop."""
        from .audit import read_run

        return read_run(self.store, run_id)

    def runs(self, limit: int = 50, **filters) -> list[dict]:
        """Recorded runs, newest first."""
        from .audit import list_runs

        return list_runs(self.store, limit=limit, **filters)


def _insert_runs(con, runs, created, facts_version) -> None:
    """Record answered questions: one INSERT for the runs and one for their fetches, each
    column passed as a list (a batch of answers is two statements, not one per row)."""
    cols = list(zip(*[(doc["run_id"], doc["question"], doc.get("subject"), doc.get("relation"),
                       doc["strategy"], doc["policy_version"], doc["answer"], doc["confidence"],
                       doc["abstained"], doc.get("reason"), json.dumps(doc["ranked"]),
                       json.dumps(doc["start_entities"]), round(ms, 3)) for doc, _, ms in runs]))
    if not cols:
        return
    con.execute("INSERT INTO runs SELECT unnest($1::VARCHAR[]), $2::TIMESTAMP, "
                "unnest($3::VARCHAR[]), unnest($4::VARCHAR[]), unnest($5::VARCHAR[]), "
                "unnest($6::VARCHAR[]), unnest($7::INTEGER[]), unnest($8::VARCHAR[]), "
                "unnest($9::DOUBLE[]), unnest($10::BOOLEAN[]), unnest($11::VARCHAR[]), "
                "unnest($12::VARCHAR[])::JSON, unnest($13::VARCHAR[])::JSON, $14::INTEGER, "
                "unnest($15::DOUBLE[])",
                [list(cols[0]), created, *[list(c) for c in cols[1:12]], int(facts_version),
                 list(cols[12])])
    rows = [(doc["run_id"], f["hop"], f["fact_id"], f["probability"], f["from"], f["to"],
             json.dumps(f["alternatives"]), f["direction"])
            for doc, _, _ in runs for f in doc["fetches"]]
    if rows:
        f = [list(c) for c in zip(*rows)]
        con.execute("INSERT INTO run_fetches (run_id, hop, fact_id, probability, from_entity, "
                    "to_entity, alternatives, direction) SELECT unnest($1::VARCHAR[]), "
                    "unnest($2::INTEGER[]), unnest($3::INTEGER[]), unnest($4::DOUBLE[]), "
                    "unnest($5::VARCHAR[]), unnest($6::VARCHAR[]), unnest($7::VARCHAR[])::JSON, "
                    "unnest($8::VARCHAR[])", f)


def _alternative(graph, info, fact_row, p):
    if fact_row is None:
        return {"fact_id": None, "text": "(stop and answer here)", "probability": round(p, 6)}
    fid = int(graph.fact_ids[fact_row])
    r = info.get(fid)
    return {"fact_id": fid, "text": r[4] if r else None, "probability": round(p, 6)}


def _summarise(rows) -> dict:
    def agg(sel):
        if not sel:
            return None
        a = np.array([r[1:5] for r in sel], float)
        return {"n": len(sel), "hits1": round(a[:, 0].mean(), 4), "mrr": round(a[:, 1].mean(), 4),
                "mean_fetches": round(a[:, 2].mean(), 3), "ms_per_question": round(a[:, 3].mean(), 2),
                "abstained": round(float(np.mean([r[5] for r in sel])), 4)}
    out = agg(rows)
    hops = sorted({r[0] for r in rows if r[0] is not None})
    out["by_hops"] = {str(h): agg([r for r in rows if r[0] == h]) for h in hops}
    return out
