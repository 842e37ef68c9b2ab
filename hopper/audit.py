"""Audit: read recorded runs back, show them to a person (terminal, HTML), replay them and ask what each fetched fact was worth."""
from __future__ import annotations

import datetime as _dt
import html
import json
import re
import unicodedata
from pathlib import Path

from .errors import InputError
from .files import write_atomic
from .policy import mark_stops
from .store import Store, first

MIN_PREFIX = 6  # characters of a run id that may stand for the whole id
CAUTION = ("Caution: an answer is only as good as the loaded facts and the trained policy; "
           "check the facts it rests on before relying on it for anything consequential.")
STOP_TEXT = "(stop and answer here)"

_RUN_COLUMNS = ("run_id, created_at, question, subject, relation, strategy, policy_version, answer, "
                "confidence, abstained, reason, ranked, start_entities, facts_version, elapsed_ms")


# -- reading ----------------------------------------------------------------------------------
def _iso(ts) -> str | None:
    """Recorded times are UTC without a zone; say so in the ISO text."""
    if ts is None:
        return None
    return ts.isoformat(timespec="seconds") + "Z"


def _resolve_run_id(con, run_id) -> str:
    if not isinstance(run_id, str) or not run_id.strip():
        raise InputError("give a run id", field="RUN_ID", hint="list recorded runs with 'hopper audit --list'")
    run_id = run_id.strip()
    if first(con.execute("SELECT count(*) FROM runs WHERE run_id = ?", [run_id]))[0]:
        return run_id
    if len(run_id) >= MIN_PREFIX:
        rows = con.execute("SELECT run_id FROM runs WHERE starts_with(run_id, ?) ORDER BY run_id LIMIT 3",
                           [run_id]).fetchall()
        if len(rows) == 1:
            return rows[0][0]
        if len(rows) > 1:
            raise InputError(f"run id prefix '{run_id}' matches more than one run "
                             f"({', '.join(r[0] for r in rows)}...)", field="RUN_ID",
                             hint="give more characters of the id")
    raise InputError(f"no recorded run '{run_id}'", field="RUN_ID",
                     hint="list recorded runs with 'hopper audit --list'")


def _direction(subject, obj, frm, to) -> str:
    """Which way the walk crossed a fact.

    Mostly it moved subject -> object (forward) or object -> subject (inverse).  The recorded
    row keeps the two ends, so: forward when it arrived at the object; for a fact whose
    subject and object are the same entity, forward when it left from the subject.
    """
    if subject == obj:
        return "forward" if frm == subject else "inverse"
    if to == obj:
        return "forward"
    if to == subject:
        return "inverse"
    return "forward" if frm == subject else "inverse"


def read_run(store: Store, run_id: str) -> dict:
    """The run as recorded, with ``fetches`` keyed as ``ask --json`` printed them."""
    with store.connect() as con:
        rid = _resolve_run_id(con, run_id)
        row = first(con.execute(f"SELECT {_RUN_COLUMNS} FROM runs WHERE run_id = ?", [rid]))
        fetch_rows = con.execute(
            "SELECT rf.hop, rf.fact_id, f.subject, f.relation, f.object, f.text, rf.probability, "
            "rf.from_entity, rf.to_entity, f.source, rf.alternatives "
            "FROM run_fetches rf LEFT JOIN facts f ON f.fact_id = rf.fact_id "
            "WHERE rf.run_id = ? ORDER BY rf.hop", [rid]).fetchall()
        (run_id_, created, question, subject, relation, strategy, version, answer, confidence,
         abstained, reason, ranked, starts, facts_version, elapsed) = row
        settings = first(con.execute("SELECT settings FROM policies WHERE version = ?",
                                     [version])) if version is not None else None
    chains = json.loads(settings[0] or "{}").get("chain_names", []) if settings else []
    fetches = []
    for hop, fid, s, r, o, text, p, frm, to, source, alts in fetch_rows:
        fetches.append({
            "hop": int(hop), "fact_id": int(fid), "subject": s, "relation": r, "object": o,
            "text": text, "probability": float(p), "direction": _direction(s, o, frm, to),
            "from": frm, "to": to, "source": source,
            "alternatives": json.loads(alts) if alts else []})
    if strategy == "policy":
        mark_stops(fetches, chains)
    return {
        "run_id": run_id_, "created_at": _iso(created), "question": question,
        "subject": subject, "relation": relation, "strategy": strategy,
        "policy_version": version, "answer": answer,
        "confidence": float(confidence) if confidence is not None else None,
        "abstained": bool(abstained), "reason": reason,
        "ranked": json.loads(ranked) if ranked else [],
        "start_entities": json.loads(starts) if starts else [],
        "facts_version": facts_version,
        "elapsed_ms": float(elapsed) if elapsed is not None else None,
        "fetches": fetches,
    }


_DATE = re.compile(r"\d{4}-\d{2}-\d{2}")


def _parse_since(since) -> _dt.datetime | None:
    if since is None:
        return None
    if isinstance(since, _dt.datetime):
        return since
    if isinstance(since, _dt.date):
        return _dt.datetime(since.year, since.month, since.day)
    text = str(since).strip()
    try:
        if not _DATE.fullmatch(text):
            raise ValueError
        day = _dt.date.fromisoformat(text)
    except ValueError:
        raise InputError(f"must be a date as YYYY-MM-DD (got {since!r})", field="--since") from None
    return _dt.datetime(day.year, day.month, day.day)


def list_runs(store: Store, limit: int = 50, contains: str | None = None, answer: str | None = None,
              since=None, abstained: bool | None = None) -> list[dict]:
    """Recorded runs, newest first, optionally filtered.

    ``contains``: text in the question (any case); ``answer``: the answer (any case);
    ``since``: on or after this UTC date (YYYY-MM-DD); ``abstained``: True or False.
    """
    if isinstance(limit, bool) or not isinstance(limit, int) or limit < 1:
        raise InputError(f"must be a whole number of at least 1 (got {limit!r})", field="--limit")
    where, params = [], []
    if contains is not None:
        where.append("strpos(lower(r.question), lower(?)) > 0")
        params.append(str(contains))
    if answer is not None:
        where.append("lower(r.answer) = lower(?)")
        params.append(str(answer))
    start = _parse_since(since)
    if start is not None:
        where.append("r.created_at >= ?")
        params.append(start)
    if abstained is not None:
        where.append("r.abstained = ?")
        params.append(bool(abstained))
    sql = ("SELECT r.run_id, r.created_at, r.question, r.answer, r.confidence, r.abstained, "
           "r.strategy, r.policy_version, "
           "(SELECT count(*) FROM run_fetches f WHERE f.run_id = r.run_id) AS n_fetches "
           "FROM runs r" + (" WHERE " + " AND ".join(where) if where else "") +
           " ORDER BY r.created_at DESC, r.rowid DESC LIMIT ?")
    params.append(int(limit))
    with store.connect() as con:
        rows = con.execute(sql, params).fetchall()
    return [{"run_id": r[0], "created_at": _iso(r[1]), "question": r[2], "answer": r[3],
             "confidence": float(r[4]) if r[4] is not None else None, "abstained": bool(r[5]),
             "strategy": r[6], "policy_version": r[7], "fetches": int(r[8])} for r in rows]


# -- terminal text ------------------------------------------------------------------------------
def _clean(text) -> str:
    """Text safe for a terminal: control characters (escape sequences, newlines) made visible."""
    if text is None:
        return ""
    out = []
    for ch in str(text):
        cat = unicodedata.category(ch)
        if cat == "Cc" or ch in "\u2028\u2029":
            out.append(" " if ch in "\t\n\r" else "\ufffd")
        elif cat == "Cf" and ch not in "\u200d\u200c":
            continue  # bidi overrides and other invisible format characters
        else:
            out.append(ch)
    return "".join(out)


def char_width(ch: str) -> int:
    """Columns a character takes in a terminal: 0 combining/zero-width, 2 East Asian wide."""
    if unicodedata.combining(ch) or unicodedata.category(ch) in ("Mn", "Me", "Cf") or ch == "\u200b":
        return 0
    if unicodedata.east_asian_width(ch) in ("W", "F"):
        return 2
    return 1


def text_width(text: str) -> int:
    return sum(char_width(c) for c in text)


def _fit(text: str, width: int) -> str:
    """Cut text to at most ``width`` columns, marking the cut with an ellipsis."""
    if text_width(text) <= width:
        return text
    out, used = [], 0
    for ch in text:
        w = char_width(ch)
        if used + w > width - 1:
            break
        out.append(ch)
        used += w
    return "".join(out) + "…"


def _pad(text: str, width: int, right: bool = False) -> str:
    gap = " " * max(0, width - text_width(text))
    return gap + text if right else text + gap


def _table(header: list[str], rows: list[list[str]], right: set = frozenset(), indent: str = "") -> list[str]:
    """Aligned columns by display width; the last column is not padded."""
    cols = len(header)
    widths = [max(text_width(r[i]) for r in [header] + rows) for i in range(cols)]
    lines = []
    for r in [header] + rows:
        cells = [(_pad(r[i], widths[i], i in right) if i < cols - 1 else r[i]) for i in range(cols)]
        lines.append((indent + "  ".join(cells)).rstrip())
    return lines


def _fmt_p(p) -> str:
    return "-" if p is None else f"{float(p):.2f}"


def path_text(run: dict) -> str:
    """The chain as a path: ``A --made by--> B --based in--> C`` (``<--rel--`` when walked backwards)."""
    fetches = run.get("fetches") or []
    if not fetches:
        starts = run.get("start_entities") or []
        return (_clean(starts[0]) + " (no facts fetched)") if starts else "(no facts fetched)"
    parts = [_clean(fetches[0].get("from") or fetches[0].get("subject"))]
    for f in fetches:
        rel = _clean(f.get("relation"))
        arrow = f" --{rel}--> " if f.get("direction", "forward") == "forward" else f" <--{rel}-- "
        parts.append(arrow + _clean(f.get("to")))
    return "".join(parts)


def _best_alternative(f: dict):
    alts = f.get("alternatives") or []
    return max(alts, key=lambda a: a.get("probability") or 0.0) if alts else None


def _alt_text(a: dict) -> str:
    if a.get("fact_id") is None:
        return STOP_TEXT
    return f"{_clean(a.get('text'))} [{a['fact_id']}]"


def format_run(run: dict) -> str:
    """A readable terminal view of one recorded run."""
    lines = [f"run       {run['run_id']}" + (f"   ({run['created_at']})" if run.get("created_at") else ""),
             f"question  {_clean(run['question'])}"]
    if run.get("abstained") or run.get("answer") is None:
        lines.append(f"answer    (none: abstained) - {_clean(run.get('reason') or 'no answer')}")
    else:
        lines.append(f"answer    {_clean(run['answer'])}")
    conf = run.get("confidence")
    how = f"strategy {run.get('strategy')}"
    if run.get("policy_version") is not None:
        how += f", policy v{run['policy_version']}"
    lines.append(f"confidence {_fmt_p(conf)}   ({how})")
    lines.append("")
    lines.append("path      " + path_text(run))
    fetches = run.get("fetches") or []
    if fetches:
        lines.append("")
        rows = []
        for f in fetches:
            alt = _best_alternative(f)
            rows.append([str(f["hop"]), _fmt_p(f.get("probability")), str(f["fact_id"]),
                         _fit(_clean(f.get("text")), 70), _clean(f.get("source")) or "-"])
        table = _table(["hop", "p", "fact", "text", "source"], rows, right={0, 1, 2}, indent="  ")
        lines.append(table[0])
        for f, line in zip(fetches, table[1:]):
            lines.append(line)
            alt = _best_alternative(f)
            if alt is not None:
                lines.append(f"        beat: {_fit(_alt_text(alt), 80)}  (p={_fmt_p(alt.get('probability'))})")
            else:
                lines.append("        beat: (no other option at this step)")
            if f.get("stop_offered") is False:
                lines.append(f"        STOP not offered: midway along {_clean(f['midway_along'][0])}"
                             + (f" (or {len(f['midway_along']) - 1} more)"
                                if len(f["midway_along"]) > 1 else ""))
    ranked = run.get("ranked") or []
    if len(ranked) > 1:
        lines.append("")
        lines.append("next best: " + ", ".join(f"{_clean(r['answer'])} ({r['score']:.2f})" for r in ranked[1:4]))
    lines.append("")
    lines.append(CAUTION)
    return "\n".join(lines)


def format_list(runs: list[dict]) -> str:
    """Recorded runs as an aligned table, newest first."""
    if not runs:
        return "no recorded runs match (answer a question with 'hopper ask' to record one)"
    rows = []
    for r in runs:
        ans = "(abstained)" if r.get("abstained") or r.get("answer") is None else _clean(r["answer"])
        when = (r.get("created_at") or "").replace("T", " ").rstrip("Z")
        rows.append([r["run_id"], when, _fit(ans, 28), _fmt_p(r.get("confidence")),
                     str(r.get("fetches", "")), str(r.get("strategy") or ""), _fit(_clean(r["question"]), 60)])
    lines = _table(["run", "when (UTC)", "answer", "conf", "fetches", "strategy", "question"], rows,
                   right={3, 4})
    return "\n".join(lines)


_EVAL_METRICS = (("hits1", "Hits@1", "{:.3f}"), ("mrr", "MRR", "{:.3f}"),
                 ("mean_fetches", "fetches/question", "{:.2f}"),
                 ("ms_per_question", "ms/question", "{:.1f}"), ("abstained", "abstained", "{:.3f}"))


def format_eval(result: dict) -> str:
    """The strategies side by side, over all questions and per hop count."""
    table = result.get("strategies") or {}
    names = [s for s in ("policy", "greedy", "walk") if s in table] + \
        [s for s in table if s not in ("policy", "greedy", "walk")]
    if not names:
        return "no strategies evaluated"

    def cell(block, key, fmt):
        if not block or block.get(key) is None:
            return "-"
        return fmt.format(block[key])

    header = ["", *[f"{s} v{result['policy_version']}" if s == "policy" and result.get("policy_version")
                    else s for s in names]]
    rows = []

    def section(title, blocks):
        n = next((b["n"] for b in blocks if b), 0)
        rows.append([f"{title} (n={n})"] + [""] * len(names))
        for key, label, fmt in _EVAL_METRICS:
            rows.append([f"  {label}"] + [cell(b, key, fmt) for b in blocks])

    section("all questions", [table[s] for s in names])
    hop_keys = sorted({h for s in names for h in (table[s].get("by_hops") or {})},
                      key=lambda h: (int(h) if str(h).isdigit() else 10 ** 6, str(h)))
    for h in hop_keys:
        blocks = [(table[s].get("by_hops") or {}).get(h) for s in names]
        section(f"{h} hop" + ("" if str(h) == "1" else "s"), blocks)
    widths = [max(text_width(r[i]) for r in [header] + rows) for i in range(len(header))]
    out = [f"{result.get('questions', 0)} questions"]
    for r in [header] + rows:
        out.append("  ".join(_pad(c, widths[i], right=i > 0) for i, c in enumerate(r)).rstrip())
    out.append("Hits@1: share of questions whose top answer is right; MRR: mean reciprocal rank "
               "of the first right answer.")
    return "\n".join(out)


# -- HTML -----------------------------------------------------------------------------------------
def _e(text) -> str:
    return html.escape("" if text is None else str(text), quote=True)


def _short(text, n) -> str:
    text = "" if text is None else str(text)
    return text if len(text) <= n else text[: n - 1] + "…"


_CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",Roboto,sans-serif;margin:24px;color:#1d2430;background:#fff}
h1{font-size:20px;margin:0 0 4px} h2{font-size:16px;margin:24px 0 8px}
.q{font-size:17px;margin:8px 0} .a{font-size:17px;font-weight:600}
.abst{color:#9a3412} .meta{color:#5b6472;font-size:13px}
table{border-collapse:collapse;font-size:14px} th,td{border:1px solid #d5dae1;padding:4px 8px;text-align:left;vertical-align:top}
th{background:#f1f4f8} td.num{text-align:right;font-variant-numeric:tabular-nums}
.alt{color:#6b7280;font-size:13px} .caution{margin-top:24px;padding:8px 12px;background:#fff7e6;border:1px solid #f3d08a}
svg{border:1px solid #e3e7ee;background:#fbfcfe;max-width:100%;height:auto}
code{font-size:13px}
"""


def _svg(run: dict) -> str:
    fetches = run.get("fetches") or []
    starts = run.get("start_entities") or []
    nodes = [fetches[0].get("from") or fetches[0].get("subject")] if fetches else \
        ([starts[0]] if starts else ["(no entity linked)"])
    nodes += [f.get("to") for f in fetches]
    gap, node_w, node_h, x0, y = 270, 170, 44, 30, 70
    max_alts = max([min(3, len(f.get("alternatives") or [])) for f in fetches] + [0])
    width = x0 * 2 + node_w + gap * (len(nodes) - 1)
    height = y + node_h + 40 + max_alts * 46 + 20
    answer = run.get("answer")
    parts = [f'<svg xmlns="http://www.w3.org/2000/svg" width="{width}" height="{height}" '
             f'viewBox="0 0 {width} {height}" role="img" aria-label="the path of fetched facts">',
             '<defs><marker id="arrow" viewBox="0 0 10 10" refX="9" refY="5" markerWidth="7" '
             'markerHeight="7" orient="auto-start-reverse"><path d="M0,0 L10,5 L0,10 z" fill="#2b5797"/>'
             '</marker></defs>']
    cx = [x0 + i * gap for i in range(len(nodes))]
    # alternatives first, so the main path is drawn over them
    for i, f in enumerate(fetches):
        alts = sorted(f.get("alternatives") or [], key=lambda a: -(a.get("probability") or 0.0))[:3]
        sx, sy = cx[i] + node_w / 2, y + node_h
        for k, a in enumerate(alts):
            ay = y + node_h + 40 + k * 46
            ax = cx[i] + 40
            label = STOP_TEXT if a.get("fact_id") is None else a.get("text")
            parts.append(f'<g class="alt" opacity="0.6"><title>{_e(label)} (p={_fmt_p(a.get("probability"))})</title>'
                         f'<path d="M{sx:.0f},{sy} C{sx:.0f},{ay + 12} {ax - 10},{ay + 12} {ax},{ay + 12}" '
                         f'fill="none" stroke="#8a94a6" stroke-width="1.2" stroke-dasharray="4 3"/>'
                         f'<rect x="{ax}" y="{ay}" width="{gap + node_w - 60}" height="24" rx="4" '
                         f'fill="#f3f4f6" stroke="#b8c0cc" stroke-dasharray="4 3"/>'
                         f'<text x="{ax + 6}" y="{ay + 16}" font-size="11" fill="#4b5563">'
                         f'{_e(_short(label, 52))}  p={_fmt_p(a.get("probability"))}</text></g>')
    for i, f in enumerate(fetches):
        x1, x2 = cx[i] + node_w, cx[i + 1]
        ym = y + node_h / 2
        fwd = f.get("direction", "forward") == "forward"
        label = f"{f.get('relation')}" + ("" if fwd else " (inverse)")
        parts.append(f'<g class="step"><title>{_e(f.get("text"))}</title>'
                     f'<line x1="{x1}" y1="{ym}" x2="{x2 - 2}" y2="{ym}" stroke="#2b5797" stroke-width="2.2" '
                     f'marker-end="url(#arrow)"/>'
                     f'<text x="{(x1 + x2) / 2:.0f}" y="{ym - 10}" font-size="12" text-anchor="middle" '
                     f'fill="#1d3b6b">{_e(_short(label, 26))}</text>'
                     f'<text x="{(x1 + x2) / 2:.0f}" y="{ym + 18}" font-size="11" text-anchor="middle" '
                     f'fill="#374151">p={_fmt_p(f.get("probability"))} · fact {_e(f.get("fact_id"))}</text></g>')
    for i, name in enumerate(nodes):
        is_answer = i == len(nodes) - 1 and answer is not None and name == answer
        fill, stroke = ("#e6f4ea", "#2f855a") if is_answer else (("#e8eefb", "#2b5797") if i == 0 else ("#ffffff", "#5b6472"))
        parts.append(f'<g class="entity"><title>{_e(name)}</title>'
                     f'<rect x="{cx[i]}" y="{y}" width="{node_w}" height="{node_h}" rx="8" fill="{fill}" '
                     f'stroke="{stroke}" stroke-width="1.6"/>'
                     f'<text x="{cx[i] + node_w / 2:.0f}" y="{y + 27}" font-size="13" text-anchor="middle" '
                     f'font-weight="{600 if is_answer or i == 0 else 400}">{_e(_short(name, 22))}</text></g>')
    parts.append(f'<text x="{x0}" y="30" font-size="12" fill="#5b6472">question entity → answer; '
                 f'faded dashed boxes: the best options passed over at each step</text>')
    parts.append("</svg>")
    return "".join(parts)


def render_html(run: dict) -> str:
    """The self-contained page (no scripts, no network) for one run."""
    fetches = run.get("fetches") or []
    if run.get("abstained") or run.get("answer") is None:
        ans = f'<p class="a abst">No answer (abstained): {_e(run.get("reason") or "no answer")}</p>'
    else:
        ans = f'<p class="a">Answer: {_e(run["answer"])}</p>'
    meta = (f'run {_e(run["run_id"])} · {_e(run.get("created_at"))} · strategy {_e(run.get("strategy"))}'
            + (f' · policy v{_e(run["policy_version"])}' if run.get("policy_version") is not None else "")
            + f' · confidence {_fmt_p(run.get("confidence"))}')
    steps = []
    for f in fetches:
        alts = "".join(f'<li>{_e(STOP_TEXT if a.get("fact_id") is None else a.get("text"))}'
                       + ("" if a.get("fact_id") is None else f' <code>[{_e(a["fact_id"])}]</code>')
                       + f' p={_fmt_p(a.get("probability"))}</li>' for a in (f.get("alternatives") or []))
        steps.append(f'<tr><td class="num">{_e(f["hop"])}</td><td>{_e(f.get("from"))} → {_e(f.get("to"))}'
                     f'<br><span class="alt">{_e(f.get("relation"))}, {_e(f.get("direction"))}</span></td>'
                     f'<td>{_e(f.get("text"))}</td><td><code>{_e(f["fact_id"])}</code></td>'
                     f'<td class="num">{_fmt_p(f.get("probability"))}</td>'
                     f'<td class="alt"><ul>{alts}</ul></td></tr>')
    steps_html = ('<table><tr><th>hop</th><th>walk</th><th>fact</th><th>id</th><th>p</th>'
                  '<th>passed over</th></tr>' + "".join(steps) + "</table>") if steps else \
        "<p>No facts were fetched.</p>"
    sources = []
    for f in fetches:
        sources.append(f'<li><code>[{_e(f["fact_id"])}]</code> {_e(f.get("text"))} — '
                       f'source: {_e(f.get("source") or "(none given)")}</li>')
    ranked = run.get("ranked") or []
    ranked_html = ("<ol>" + "".join(f'<li>{_e(r.get("answer"))} ({_fmt_p(r.get("score"))})</li>'
                                   for r in ranked[:10]) + "</ol>") if ranked else "<p>none</p>"
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            "<meta http-equiv=\"Content-Security-Policy\" content=\"default-src 'none'; "
            "style-src 'unsafe-inline'; img-src data:\">"
            "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">"
            f"<title>hopper audit {_e(run['run_id'])}</title><style>{_CSS}</style></head><body>"
            f"<h1>Why this answer</h1><p class=\"meta\">{meta}</p>"
            f"<p class=\"q\">Question: {_e(run.get('question'))}</p>{ans}"
            f"<h2>Path</h2><p>{_e(path_text(run))}</p>{_svg(run)}"
            f"<h2>Steps</h2>{steps_html}"
            f"<h2>Sources</h2><ul>{''.join(sources) or '<li>none</li>'}</ul>"
            f"<h2>Ranked answers</h2>{ranked_html}"
            f"<p class=\"caution\">{_e(CAUTION)}</p></body></html>\n")


def write_html(run: dict, path) -> str:
    """Write the run's page to ``path`` atomically; returns the path written."""
    target = Path(path)
    parent = target.parent if str(target.parent) else Path(".")
    if not parent.is_dir():
        raise InputError("the folder for the HTML page does not exist", file=str(target), field="--html",
                         hint="create the folder or choose another path")
    if target.is_dir():
        raise InputError("is a folder; give a file name for the HTML page", file=str(target), field="--html")
    page = render_html(run)
    write_atomic(target, page.encode("utf-8"))
    return str(target)


# -- what the answer rests on ---------------------------------------------------------------------
def _rerun(hp, run: dict, hidden=()) -> dict:
    # The beam is widened to --top (``Hopper._beam``), which runs do not record; the length of
    # the recorded ranking stands for it: a --top up to the policy's beam left the beam as it
    # was, and a wider one almost always reaches at least --top answers.
    return hp.rerun(run["question"], subject=run.get("subject"), relation=run.get("relation"),
                    strategy=run["strategy"], policy_version=run.get("policy_version"),
                    hidden_fact_ids=list(hidden), top=max(10, len(run.get("ranked") or [])))


def counterfactual(hp, run_id: str) -> dict:
    """Re-run the recorded question with each fetched fact hidden in turn; did the answer change?"""
    run = read_run(hp.store, run_id)
    baseline = _rerun(hp, run)
    facts = []
    for f in run["fetches"]:
        res = _rerun(hp, run, [f["fact_id"]])
        facts.append({"fact_id": f["fact_id"], "hop": f["hop"], "text": f["text"],
                      "answer_without": res["answer"],
                      "necessary": res["answer"] != run["answer"]})
    return {"run_id": run["run_id"], "question": run["question"], "answer": run["answer"],
            "answer_now": baseline["answer"], "facts": facts}


def format_counterfactual(res: dict) -> str:
    lines = [f"run       {res['run_id']}", f"question  {_clean(res.get('question'))}",
             f"answer    {_clean(res['answer']) if res['answer'] is not None else '(none: abstained)'}"]
    if res.get("answer_now", res["answer"]) != res["answer"]:
        lines.append(f"note: with nothing hidden the question is now answered "
                     f"{_clean(res['answer_now']) if res['answer_now'] is not None else '(no answer)'}, "
                     "so the store or policy has changed since the run; read the table with care")
    if not res["facts"]:
        lines.append("no facts were fetched, so there is nothing to hide")
        return "\n".join(lines)
    rows = []
    for f in res["facts"]:
        without = "(no answer)" if f["answer_without"] is None else _clean(f["answer_without"])
        rows.append([str(f["fact_id"]), "needed" if f["necessary"] else "not needed",
                     _fit(without, 30), _fit(_clean(f["text"]), 70)])
    lines.append("")
    lines.append("hiding each fetched fact in turn:")
    lines += _table(["fact", "verdict", "answer without it", "fact text"], rows, right={0}, indent="  ")
    n = sum(f["necessary"] for f in res["facts"])
    lines.append("")
    lines.append(f"{n} of {len(res['facts'])} fetched facts are needed for this answer.")
    return "\n".join(lines)


def _facts_version(store: Store):
    with store.connect() as con:
        v = Store.get_meta(con, "facts_version")
    return int(v) if v is not None else None


def replay(hp, run_id: str) -> dict:
    """Answer the recorded question again with the recorded policy version and compare."""
    run = read_run(hp.store, run_id)
    now = _rerun(hp, run)
    then_ids = [f["fact_id"] for f in run["fetches"]]
    now_ids = [f["fact_id"] for f in now["fetches"]]
    return {"run_id": run["run_id"], "question": run["question"], "strategy": run["strategy"],
            "policy_version": run.get("policy_version"),
            "same_answer": now["answer"] == run["answer"] and bool(now["abstained"]) == run["abstained"],
            "same_fetches": now_ids == then_ids,
            "answer_then": run["answer"], "answer_now": now["answer"],
            "confidence_then": run["confidence"], "confidence_now": now["confidence"],
            "fetches_then": then_ids, "fetches_now": now_ids,
            "facts_version_then": run.get("facts_version"), "facts_version_now": _facts_version(hp.store)}


def format_replay(res: dict) -> str:
    def ans(a):
        return "(no answer)" if a is None else _clean(a)

    verdict = "same answer, same fetches" if res["same_answer"] and res["same_fetches"] else \
        ("same answer, different fetches" if res["same_answer"] else "the answer changed")
    lines = [f"run       {res['run_id']}   (strategy {res.get('strategy')}"
             + (f", policy v{res['policy_version']})" if res.get("policy_version") is not None else ")"),
             f"question  {_clean(res.get('question'))}",
             f"verdict   {verdict}"]
    rows = [["answer", ans(res["answer_then"]), ans(res["answer_now"])],
            ["fetches", " ".join(map(str, res["fetches_then"])) or "-",
             " ".join(map(str, res["fetches_now"])) or "-"],
            ["facts version", str(res.get("facts_version_then")), str(res.get("facts_version_now"))]]
    lines += _table(["", "then", "now"], rows, indent="  ")
    if res.get("facts_version_then") != res.get("facts_version_now"):
        lines.append("facts were loaded since the run; a difference may come from the new facts.")
    return "\n".join(lines)
