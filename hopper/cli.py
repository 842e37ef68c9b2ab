"""The command line: a thin layer over the Python API (``hopper.api.Hopper``)."""
from __future__ import annotations

import argparse
import json
import os
import sys

from .errors import HopperError, InputError

CAUTION = ("Note: an answer is only as good as the loaded facts and the trained policy; "
           "check the facts it rests on before relying on it for anything consequential.")


class _Parser(argparse.ArgumentParser):
    """argparse, but a usage error is one line on stderr and exit status 2."""

    def error(self, message):
        raise InputError(f"{message} (see '{self.prog} --help')")


def _positive(name, lo=1, hi=None):
    def parse(text):
        try:
            value = int(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"{name} must be a whole number, not {text!r}") from None
        if value < lo or (hi is not None and value > hi):
            rng = f"from {lo} to {hi}" if hi is not None else f"at least {lo}"
            raise argparse.ArgumentTypeError(f"{name} must be {rng} (got {value})")
        return value
    return parse


def build_parser() -> argparse.ArgumentParser:
    common = argparse.ArgumentParser(add_help=False)
    common.add_argument("--store", metavar="PATH",
                        help="the store file (default: $HOPPER_STORE, else ./hopper.duckdb)")
    p = _Parser(prog="hopper", description=(
        "Answer chained questions over a fact table with a learned fetch policy, "
        "and show the facts behind every answer."))
    p.add_argument("--version", action="version", version=f"hopper {_version()}")
    sub = p.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    sub.required = True

    s = sub.add_parser("load", parents=[common], help="load fact tables (CSV, Parquet, JSON Lines)",
                       description="Load fact tables into the store: all rows or none, unless "
                       "--skip-invalid.  Columns: subject, relation, object (required); text, source, id.")
    s.add_argument("files", nargs="+", metavar="FILE")
    s.add_argument("--skip-invalid", action="store_true",
                   help="load the valid rows; write rejected rows with reasons to FILE.rejected.csv")
    s.add_argument("--json", action="store_true", help="print the load report as JSON")

    s = sub.add_parser("info", parents=[common], help="what the store holds")
    s.add_argument("--json", action="store_true")

    s = sub.add_parser("train", parents=[common], help="train the fetch policy by REINFORCE",
                       description="Train a fetch policy on question/answer pairs (JSON Lines) and "
                       "store it as a new version.  The active policy changes only when training "
                       "ends; after each epoch the run's state is saved beside the store, so an "
                       "interrupted run continues with --resume.")
    s.add_argument("--questions", required=True, metavar="FILE")
    s.add_argument("--valid", metavar="FILE", help="validation questions (default: a tenth of --questions)")
    s.add_argument("--seed", type=_positive("--seed", 0), default=0)
    s.add_argument("--max-hops", type=_positive("--max-hops", 1, 8), default=4)
    s.add_argument("--epochs", type=_positive("--epochs", 1, 10000), default=None)
    s.add_argument("--members", type=_positive("--members", 1, 16), default=None,
                   help="train this many policies from different seeds, to answer together "
                        "side by side on the cores there are (steadier on new wordings, M "
                        "times the training work; default 3)")
    s.add_argument("--no-chains", action="store_true",
                   help="do not hold walks to the relation chains the training questions are "
                        "answered by (by default a walk never stops midway along one)")
    s.add_argument("--time-budget", type=_positive("--time-budget", 0), default=None,
                   metavar="SECONDS", help="stop training after this many seconds")
    s.add_argument("--resume", action="store_true",
                   help="continue an interrupted run from its checkpoint beside the store "
                        "(give the same questions and settings)")
    s.add_argument("--json", action="store_true")

    s = sub.add_parser("ask", parents=[common], help="answer a question, or a file of them",
                       description="Answer a question in words, a --subject/--relation completion "
                       "question, or every line of a --questions file.  " + CAUTION)
    s.add_argument("question", nargs="?")
    s.add_argument("--subject")
    s.add_argument("--relation")
    s.add_argument("--questions", metavar="FILE", help="JSON Lines file; answers come out in the same order")
    s.add_argument("--strategy", choices=("policy", "greedy", "walk"), default="policy")
    s.add_argument("--top", type=_positive("--top", 1, 1000), default=10)
    s.add_argument("--no-record", action="store_true", help="do not record the run for audit")
    s.add_argument("--json", action="store_true")

    s = sub.add_parser("eval", parents=[common], help="the policy against the greedy and walk baselines")
    s.add_argument("--questions", required=True, metavar="FILE")
    s.add_argument("--json", action="store_true")

    s = sub.add_parser("audit", parents=[common], help="show the fetches behind a recorded answer")
    s.add_argument("run_id", nargs="?")
    s.add_argument("--list", action="store_true", help="recorded runs, newest first")
    s.add_argument("--limit", type=_positive("--limit", 1), default=50)
    s.add_argument("--contains", metavar="TEXT", help="with --list: question contains TEXT")
    s.add_argument("--answer", metavar="TEXT", help="with --list: answer equals TEXT")
    s.add_argument("--since", metavar="DATE", help="with --list: runs on or after DATE (YYYY-MM-DD)")
    s.add_argument("--abstained", action="store_true", help="with --list: only abstentions")
    s.add_argument("--html", metavar="FILE", help="write a self-contained HTML page")
    s.add_argument("--counterfactual", action="store_true",
                   help="hide each fetched fact in turn and report which ones the answer depends on")
    s.add_argument("--replay", action="store_true",
                   help="answer again with the recorded policy version and compare")
    s.add_argument("--json", action="store_true")

    s = sub.add_parser("demo", help="build the demo store, train, answer and audit",
                       description="Build the demo store from factstores/, train a policy, answer "
                       "a few questions, compare with greedy retrieval and show one audit.")
    s.add_argument("--store", metavar="PATH", default=None,
                   help="where to build the demo store (default: $HOPPER_STORE, else ./hopper.duckdb)")
    s.add_argument("--quick", action="store_true", help="a short training run (about a minute)")
    return p


def _version() -> str:
    from . import __version__
    return __version__


def _store_path(args):
    return getattr(args, "store", None) or os.environ.get("HOPPER_STORE") or "hopper.duckdb"


def _print_json(obj) -> None:
    sys.stdout.write(json.dumps(obj, ensure_ascii=False, default=str) + "\n")


def _cmd_load(args, hp):
    report = hp.load(args.files, skip_invalid=args.skip_invalid)
    if args.json:
        return _print_json(report)
    print(f"read {report['rows_read']} rows: {report['facts_added']} new facts, "
          f"{report['duplicates']} already stored, {report['rejected']} rejected")
    for f in report["rejected_files"]:
        print(f"rejected rows and reasons: {f}")
    print(f"{report['entities_added']} new entities, {report['relations_added']} new relations, "
          f"{report['embedded']} texts embedded"
          + (f", {report['reused']} vectors reused from an interrupted load" if report["reused"] else ""))


def _cmd_info(args, hp):
    info = hp.info()
    if args.json:
        return _print_json(info)
    print(f"store      {info['store']}")
    print(f"facts      {info['facts']}")
    print(f"entities   {info['entities']}")
    print(f"relations  {info['relations']}")
    print(f"runs       {info['runs']}")
    print(f"model      {info['model']}" + (f" ({info['model_dim']} dims" + (
        f", {info['model_precision']} vectors" if info.get("model_precision") else "") + ")"
        if info.get("model_dim") else ""))
    pol = info["policy"]
    if pol:
        sc = pol["scores"]
        print(f"policy     v{pol['version']} of {pol['versions']}, trained {pol['created_at']}, "
              f"validation Hits@1 {sc.get('valid_hits1', 0):.3f}"
              + (f", {pol['settings']['members']} members" if pol["settings"].get("members", 1) > 1
                 else "")
              + (f", {len(pol['settings']['chain_names'])} relation chains"
                 if pol["settings"].get("chain_names") else ""))
    else:
        print("policy     none (run 'hopper train')")


def _cmd_train(args, hp):
    extra = {}
    if args.epochs is not None:
        extra["epochs"] = args.epochs
    if args.time_budget is not None:
        extra["time_budget"] = float(args.time_budget)
    if args.members is not None:
        extra["members"] = args.members
    if args.no_chains:
        extra["chains"] = False
    log = None if args.json else (lambda m: print(m, file=sys.stderr))
    summary = hp.train(args.questions, valid=args.valid, seed=args.seed, max_hops=args.max_hops,
                       log=log, resume=args.resume, **extra)
    if args.json:
        return _print_json(summary)
    print(f"policy v{summary['version']}: {summary['epochs']} epochs in {summary['seconds']} s "
          f"({summary['rollouts_per_second']} rollouts/s)")
    print(f"validation Hits@1 {summary['valid_hits1']:.3f}, MRR {summary['valid_mrr']:.3f}; "
          f"abstains below confidence {summary['threshold']:.2f}")
    if summary.get("members"):
        print(f"{len(summary['members'])} members answer together; their validation Hits@1 alone: "
              + ", ".join(f"{m['valid_hits1']:.3f}" for m in summary["members"]))
    if summary.get("chains"):
        shown = summary["chains"][:6]
        print(f"walks along {len(summary['chains'])} relation chains found in the training "
              f"questions: " + "; ".join(shown) + ("; ..." if len(summary["chains"]) > 6 else ""))
    print(f"baselines tuned on validation: greedy {summary['baselines']['greedy_hops']} hop(s), "
          f"walk {summary['baselines']['walk_hops']} hop(s)")
    if summary.get("curve_png"):
        print(f"training curve: {summary['curve_png']}")


def _print_answer(doc, brief=False):
    if doc["abstained"]:
        print(f"Q: {doc['question']}\nA: (no answer) - {doc.get('reason', '')}")
    else:
        print(f"Q: {doc['question']}\nA: {doc['answer']}   (confidence {doc['confidence']:.2f})")
    if brief:
        return
    if doc["fetches"]:
        print("because:")
        for f in doc["fetches"]:
            print(f"  {f['hop']}. [{f['fact_id']}] {f['text']}   p={f['probability']:.2f}")
    others = [r for r in doc["ranked"][1:4]]
    if others:
        print("next best: " + ", ".join(f"{r['answer']} ({r['score']:.2f})" for r in others))
    print(f"run {doc['run_id']}  (hopper audit {doc['run_id']})" if doc.get("recorded", True) else "")


def _cmd_ask(args, hp):
    modes = sum([args.question is not None, args.subject is not None or args.relation is not None,
                 args.questions is not None])
    if modes != 1:
        raise InputError("give exactly one of: a QUESTION, --subject with --relation, or --questions FILE")
    if args.questions:
        docs = hp.ask_many(args.questions, strategy=args.strategy, top=args.top,
                           record=not args.no_record)
    else:
        if args.subject is not None and args.relation is None:
            raise InputError("--subject needs --relation", field="--relation")
        if args.relation is not None and args.subject is None:
            raise InputError("--relation needs --subject", field="--subject")
        docs = [hp.ask(args.question, subject=args.subject, relation=args.relation,
                       strategy=args.strategy, top=args.top, record=not args.no_record)]
    if args.json:
        for d in docs:
            _print_json(d)
        return
    for i, d in enumerate(docs):
        if i:
            print()
        _print_answer(d, brief=len(docs) > 1)
    print("\n" + CAUTION)


def _cmd_eval(args, hp):
    res = hp.evaluate(args.questions)
    if args.json:
        return _print_json(res)
    from .audit import format_eval
    print(format_eval(res))


def _cmd_audit(args, hp):
    from . import audit

    if args.list:
        runs = hp.runs(limit=args.limit, contains=args.contains, answer=args.answer,
                       since=args.since, abstained=args.abstained or None)
        if args.json:
            return _print_json(runs)
        return print(audit.format_list(runs))
    if not args.run_id:
        raise InputError("give a RUN_ID, or --list", field="RUN_ID")
    if args.counterfactual:
        res = audit.counterfactual(hp, args.run_id)
        return _print_json(res) if args.json else print(audit.format_counterfactual(res))
    if args.replay:
        res = audit.replay(hp, args.run_id)
        return _print_json(res) if args.json else print(audit.format_replay(res))
    run = hp.audit(args.run_id)
    if args.html:
        path = audit.write_html(run, args.html)
        if not args.json:
            print(f"wrote {path}")
    if args.json:
        return _print_json(run)
    if not args.html:
        print(audit.format_run(run))


def _cmd_demo(args):
    from .demo import run_demo

    run_demo(_store_path(args), quick=args.quick)


def main(argv=None) -> int:
    os.environ.setdefault("HF_HUB_OFFLINE", "1")
    os.environ.setdefault("TRANSFORMERS_OFFLINE", "1")
    # hopper's numpy work is many small products; BLAS threads only add waiting there
    os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
    args = None
    try:
        args = build_parser().parse_args(argv)
        if args.command == "demo":
            _cmd_demo(args)
            return 0
        from .api import Hopper

        hp = Hopper(_store_path(args))
        {"load": _cmd_load, "info": _cmd_info, "train": _cmd_train, "ask": _cmd_ask,
         "eval": _cmd_eval, "audit": _cmd_audit}[args.command](args, hp)
        return 0
    except InputError as exc:
        print(f"hopper: {exc}", file=sys.stderr)
        return 2
    except HopperError as exc:
        print(f"hopper: {exc}", file=sys.stderr)
        return exc.exit_status
    except KeyboardInterrupt:
        resume = ""
        if getattr(args, "command", None) == "train":
            from .store import Store
            if Store(_store_path(args)).checkpoint_path.exists():
                resume = " (hopper train --resume with the same arguments continues the training)"
        print(f"hopper: interrupted; the store is as it was before this command{resume}",
              file=sys.stderr)
        return 130
    except BrokenPipeError:
        return 0
    except Exception as exc:  # noqa: BLE001 - an internal fault: one line unless debugging
        if os.environ.get("HOPPER_DEBUG"):
            raise
        print(f"hopper: internal error: {type(exc).__name__}: {exc} "
              "(set HOPPER_DEBUG=1 for the traceback)", file=sys.stderr)
        return 1


if __name__ == "__main__":
    sys.exit(main())
