"""Loading fact tables: read CSV/Parquet/JSON Lines with DuckDB, validate, dedupe, embed, store."""
from __future__ import annotations

import csv
import difflib
import re
import sys
from dataclasses import dataclass, field
from pathlib import Path

import duckdb

from .errors import InputError
from .store import Store, first

REQUIRED = ("subject", "relation", "object")
OPTIONAL = ("text", "source", "id")
MAX_NAME = 1_000      # characters in a subject, relation or object
MAX_TEXT = 20_000     # characters in a fact's text
FORMATS = {".csv": "csv", ".tsv": "csv", ".parquet": "parquet", ".jsonl": "json", ".ndjson": "json"}
_SPACE = r"[\s\pZ]+"  # ASCII and Unicode white space, for trimming


@dataclass
class LoadReport:
    """What one ``load`` did."""

    files: list[str]
    rows_read: int = 0
    facts_added: int = 0
    duplicates: int = 0
    rejected: int = 0
    rejected_files: list[str] = field(default_factory=list)
    entities_added: int = 0
    relations_added: int = 0
    embedded: int = 0

    def as_dict(self) -> dict:
        return dict(self.__dict__)


def _first_line(exc: Exception) -> str:
    text = str(exc)
    text = re.sub(r"^[A-Za-z ]*Error: ", "", text.strip())
    return text.splitlines()[0] if text else type(exc).__name__


def _reader_error(path: Path, exc: Exception) -> InputError:
    text = str(exc)
    line = None
    m = re.search(r"(?:on Line|in line|line)[: ]+(\d+)", text, re.IGNORECASE)
    if m:
        line = int(m.group(1))
    if "unicode" in text.lower() or "utf-8" in text.lower() or "utf8" in text.lower():
        return InputError("is not valid UTF-8 text", file=str(path), line=line,
                          hint="save the file as UTF-8 and load it again")
    if "malformed json" in text.lower():
        return InputError("malformed JSON", file=str(path), line=line,
                          hint="each line must be one JSON object")
    return InputError(f"cannot be read: {_first_line(exc)}", file=str(path), line=line)


def _stage_file(stage, path: Path, n: int) -> tuple[str, int]:
    """Read one file into a staging table ``raw_{n}`` with a row number; return (kind, header lines)."""
    if not path.exists():
        raise InputError("no such file", file=str(path))
    if path.is_dir():
        raise InputError("is a folder, not a fact table", file=str(path))
    kind = FORMATS.get(path.suffix.lower())
    if kind is None:
        raise InputError(f"unknown file type '{path.suffix or '(none)'}'", file=str(path),
                         hint="use .csv, .parquet, .jsonl or .ndjson")
    try:
        with open(path, "rb") as fh:
            head = fh.read(1)
    except OSError as exc:
        raise InputError(f"cannot be read: {exc.strerror}", file=str(path)) from None
    if not head:
        raise InputError("is empty", file=str(path), hint="a fact table needs a header and rows")
    table = f"raw_{n}"
    try:
        if kind == "csv":
            delim = "\t" if path.suffix.lower() == ".tsv" else ","
            stage.execute(f"CREATE TABLE {table} AS SELECT row_number() OVER () AS _row, * FROM "
                          "read_csv(?, header = true, all_varchar = true, delim = ?, "
                          "quote = '\"', escape = '\"', strict_mode = true, "
                          "null_padding = false)", [str(path), delim])
            return kind, 1
        if kind == "parquet":
            stage.execute(f"CREATE TABLE {table} AS SELECT row_number() OVER () AS _row, * "
                          "FROM read_parquet(?)", [str(path)])
            return kind, 0
        # JSON Lines: read each line as a JSON value, then pull fields out as text.
        stage.execute(f"CREATE TABLE {table}_j AS SELECT row_number() OVER () AS _row, json "
                      "FROM read_ndjson_objects(?)", [str(path)])
        bad = first(stage.execute(f"SELECT _row FROM {table}_j WHERE json_type(json) <> 'OBJECT' "
                            "ORDER BY _row LIMIT 1"))
        if bad:
            raise InputError("is not a JSON object", file=str(path), line=bad[0],
                             hint="each line must be one JSON object")
        keys = [r[0] for r in stage.execute(
            f"SELECT DISTINCT unnest(json_keys(json)) FROM {table}_j").fetchall()]
        cols = ", ".join(f"json ->> {_sql_str('$.' + _json_path_key(k))} AS {_ident(k)}"
                         for k in keys if k)
        stage.execute(f"CREATE TABLE {table} AS SELECT _row{', ' + cols if cols else ''} "
                      f"FROM {table}_j")
        return kind, 0
    except InputError:
        raise
    except duckdb.Error as exc:
        raise _reader_error(path, exc) from None


def _sql_str(s: str) -> str:
    return "'" + s.replace("'", "''") + "'"


def _ident(s: str) -> str:
    return '"' + s.replace('"', '""') + '"'


def _json_path_key(k: str) -> str:
    return '"' + k.replace("\\", "\\\\").replace('"', '\\"') + '"'


def _columns(stage, table: str, path: Path) -> dict[str, str]:
    """Map our column names to the file's, matching case and surrounding spaces loosely."""
    names = [r[0] for r in stage.execute(f"DESCRIBE {table}").fetchall() if r[0] != "_row"]
    found = {n.strip().lower(): n for n in names}
    missing = [c for c in REQUIRED if c not in found]
    if missing:
        col = missing[0]
        close = difflib.get_close_matches(col, list(found), n=1, cutoff=0.6)
        hint = (f"found a column '{found[close[0]]}': did you mean '{col}'?" if close else
                f"the header has: {', '.join(names) or 'nothing'}; required: subject, relation, object")
        raise InputError("missing required column", file=str(path), line=1, field=col, hint=hint)
    return {c: found[c] for c in REQUIRED + OPTIONAL if c in found}


def _clean(expr: str) -> str:
    return f"regexp_replace(CAST({expr} AS VARCHAR), '^{_SPACE}|{_SPACE}$', '', 'g')"


def stage_files(paths: list[Path]):
    """Read and validate every file into an in-memory DuckDB; return (stage, report)."""
    stage = duckdb.connect()
    parts = []
    for n, path in enumerate(paths):
        kind, header = _stage_file(stage, path, n)
        cols = _columns(stage, f"raw_{n}", path)
        get = {c: (_clean(_ident(cols[c])) if c in cols else "NULL") for c in REQUIRED + OPTIONAL}
        parts.append(f"""
            SELECT {n} AS file_no, {_sql_str(str(path))} AS file, _row + {header} AS line,
                   {get['subject']} AS subject, {get['relation']} AS relation,
                   {get['object']} AS object, {get['text']} AS text,
                   {get['source']} AS source, {get['id']} AS source_id
            FROM raw_{n}""")
    stage.execute("CREATE TABLE rows AS " + " UNION ALL ".join(parts))
    checks = []
    for c in REQUIRED:
        checks.append(f"WHEN {c} IS NULL OR {c} = '' THEN '{c}|empty value'")
        checks.append(f"WHEN length({c}) > {MAX_NAME} THEN '{c}|longer than {MAX_NAME} characters'")
    checks.append(f"WHEN length(text) > {MAX_TEXT} THEN 'text|longer than {MAX_TEXT} characters'")
    stage.execute(f"""
        CREATE TABLE checked AS
        SELECT *, CASE {' '.join(checks)} ELSE NULL END AS problem FROM rows""")
    stage.execute("""
        CREATE TABLE valid AS
        SELECT file_no, line, subject, relation, object,
               coalesce(nullif(text, ''), subject || ' ' || replace(relation, '_', ' ') || ' ' || object) AS text,
               nullif(source, '') AS source, nullif(source_id, '') AS source_id,
               sha256(subject || chr(31) || relation || chr(31) || object) AS content_hash
        FROM checked WHERE problem IS NULL
        QUALIFY row_number() OVER (PARTITION BY content_hash ORDER BY file_no, line) = 1""")
    return stage


def _write_rejected(stage, paths: list[Path]) -> list[str]:
    """Write each input's rejected rows, with the reason, to ``<name>.rejected.csv`` beside it."""
    written = []
    for n, path in enumerate(paths):
        rows = stage.execute(
            "SELECT line, split_part(problem, '|', 1), split_part(problem, '|', 2), subject, "
            "relation, object, text, source, source_id FROM checked "
            "WHERE file_no = ? AND problem IS NOT NULL ORDER BY line", [n]).fetchall()
        if not rows:
            continue
        out = path.with_name(path.name + ".rejected.csv")
        with open(out, "w", newline="", encoding="utf-8") as fh:
            w = csv.writer(fh)
            w.writerow(["line", "field", "reason", "subject", "relation", "object", "text",
                        "source", "id"])
            w.writerows(rows)
        written.append(str(out))
    return written


def _vectors_table(ids, vectors, id_name: str):
    import numpy as np
    import pyarrow as pa

    vectors = np.ascontiguousarray(vectors, dtype=np.float32)
    return pa.table({id_name: pa.array(ids), "embedding": pa.FixedSizeListArray.from_arrays(
        pa.array(vectors.reshape(-1)), vectors.shape[1] if vectors.ndim == 2 else 384)})


def check_model(con, identity: dict, path) -> None:
    """Refuse to mix vectors of two embedding models in one store."""
    name = Store.get_meta(con, "model_name")
    if name is None:
        return
    digest = Store.get_meta(con, "model_sha256")
    if name != identity["name"] or digest != identity["weights_sha256"] or \
            int(Store.get_meta(con, "model_dim")) != identity["dim"]:
        raise InputError(
            f"the store's vectors were made by {name} (weights sha256 {digest[:12]}), but this "
            f"hopper embeds with {identity['name']} (weights sha256 {identity['weights_sha256'][:12]}); "
            "vectors of two models cannot be mixed", file=str(path),
            hint="load into a new store, or use the model the store was built with")


def load(store: Store, files, skip_invalid: bool = False, progress: bool | None = None,
         encoder=None) -> LoadReport:
    """Load fact tables into ``store``: all of it in one transaction, or nothing.

    With ``skip_invalid`` the valid rows load and the rejected rows are written, with the
    reason, to ``<file>.rejected.csv`` beside each input.
    """
    from . import embed

    if isinstance(files, (str, Path)):
        files = [files]
    paths = [Path(f) for f in files]
    if not paths:
        raise InputError("no files given", hint="hopper load FILE... --store PATH")
    store.check_file()
    if progress is None:
        progress = sys.stderr.isatty()
    stage = stage_files(paths)
    report = LoadReport(files=[str(p) for p in paths])
    report.rows_read = first(stage.execute("SELECT count(*) FROM rows"))[0]
    if report.rows_read == 0:
        raise InputError("has a header but no rows", file=str(paths[0]))
    bad = stage.execute("SELECT file, line, problem FROM checked WHERE problem IS NOT NULL "
                        "ORDER BY file_no, line").fetchall()
    report.rejected = len(bad)
    if bad and not skip_invalid:
        fld, why = bad[0][2].split("|", 1)
        more = f"; {len(bad) - 1} more rejected row(s)" if len(bad) > 1 else ""
        raise InputError(why + more, file=bad[0][0], line=bad[0][1], field=fld,
                         hint="fix the row, or load with --skip-invalid to keep the valid rows")
    if bad:
        report.rejected_files = _write_rejected(stage, paths)
    identity = embed.model_identity()
    n_valid = first(stage.execute("SELECT count(*) FROM valid"))[0]
    report.duplicates = report.rows_read - report.rejected - n_valid

    # Phase A (no lock held for long): find what is new, and embed it before writing.
    encoder = encoder or embed.Encoder("auto")
    known_vectors: dict[str, object] = {}

    def new_items(con):
        stage.execute("CREATE OR REPLACE TABLE have_hash (content_hash VARCHAR)")
        stage.execute("CREATE OR REPLACE TABLE have_entity (name VARCHAR)")
        stage.execute("CREATE OR REPLACE TABLE have_relation (name VARCHAR)")
        if con is not None:
            hashes = stage.sql("SELECT content_hash FROM valid").to_arrow_table()
            con.register("incoming", hashes)
            found = con.sql("SELECT content_hash FROM facts JOIN incoming USING (content_hash)"
                            ).to_arrow_table()
            ents = con.sql("SELECT name FROM entities").to_arrow_table()
            rels = con.sql("SELECT name FROM relations").to_arrow_table()
            con.unregister("incoming")
            stage.execute("INSERT INTO have_hash SELECT * FROM found")
            stage.execute("INSERT INTO have_entity SELECT * FROM ents")
            stage.execute("INSERT INTO have_relation SELECT * FROM rels")
        stage.execute("CREATE OR REPLACE TABLE new_facts AS SELECT * FROM valid "
                      "WHERE content_hash NOT IN (SELECT content_hash FROM have_hash) "
                      "ORDER BY file_no, line")
        stage.execute("CREATE OR REPLACE TABLE new_entities AS SELECT name, min(k) AS k FROM ("
                      "SELECT subject AS name, file_no * 1e12 + line * 2 AS k FROM new_facts UNION ALL "
                      "SELECT object, file_no * 1e12 + line * 2 + 1 FROM new_facts) "
                      "WHERE name NOT IN (SELECT name FROM have_entity) GROUP BY name ORDER BY k")
        stage.execute("CREATE OR REPLACE TABLE new_relations AS SELECT relation AS name, "
                      "min(file_no * 1e12 + line) AS k FROM new_facts WHERE relation NOT IN "
                      "(SELECT name FROM have_relation) GROUP BY relation ORDER BY k")

    def embed_missing():
        texts = []
        for sql, make in (("SELECT text FROM new_facts", lambda t: t),
                          ("SELECT name FROM new_entities", lambda t: t),
                          ("SELECT name FROM new_relations", lambda t: t.replace("_", " "))):
            texts += [make(r[0]) for r in stage.execute(sql).fetchall()]
        todo = sorted({t for t in texts if t not in known_vectors})
        if todo:
            vecs = encoder.encode(todo, progress=progress)
            known_vectors.update(zip(todo, vecs))
            report.embedded += len(todo)

    if store.exists():
        with store.connect() as con:
            check_model(con, identity, store.path)
            new_items(con)
    else:
        new_items(None)
    embed_missing()

    # Phase B: one short write transaction; recheck what is new in case another load landed.
    import numpy as np

    with store.transaction() as con:
        check_model(con, identity, store.path)
        new_items(con)
        embed_missing()
        fact_rows = stage.execute("SELECT text FROM new_facts").fetchall()
        ent_rows = stage.execute("SELECT name FROM new_entities").fetchall()
        rel_rows = stage.execute("SELECT name FROM new_relations").fetchall()
        e0, r0, f0, l0 = first(con.execute(
            "SELECT coalesce((SELECT max(entity_id) FROM entities), 0), "
            "coalesce((SELECT max(relation_id) FROM relations), 0), "
            "coalesce((SELECT max(fact_id) FROM facts), 0), "
            "coalesce((SELECT max(load_id) FROM loads), 0)"))
        load_id = l0 + 1
        if ent_rows:
            vec = np.stack([known_vectors[r[0]] for r in ent_rows])
            tab = _vectors_table(np.arange(e0 + 1, e0 + 1 + len(ent_rows)), vec, "entity_id")
            names = [r[0] for r in ent_rows]
            import pyarrow as pa
            tab = tab.append_column("name", pa.array(names, pa.string()))
            con.register("t_ent", tab)
            con.execute("INSERT INTO entities (entity_id, name, embedding) "
                        "SELECT entity_id, name, embedding FROM t_ent")
            con.unregister("t_ent")
        if rel_rows:
            import pyarrow as pa
            vec = np.stack([known_vectors[r[0].replace("_", " ")] for r in rel_rows])
            tab = _vectors_table(np.arange(r0 + 1, r0 + 1 + len(rel_rows)), vec, "relation_id")
            tab = tab.append_column("name", pa.array([r[0] for r in rel_rows], pa.string()))
            con.register("t_rel", tab)
            con.execute("INSERT INTO relations (relation_id, name, embedding) "
                        "SELECT relation_id, name, embedding FROM t_rel")
            con.unregister("t_rel")
        if fact_rows:
            nf = stage.sql("SELECT subject, relation, object, text, source, source_id, "
                               "content_hash FROM new_facts").to_arrow_table()
            con.register("t_new", nf)
            con.execute("""
                INSERT INTO facts SELECT ? + row_number() OVER () AS fact_id,
                    s.entity_id, r.relation_id, o.entity_id, n.subject, n.relation, n.object,
                    n.text, n.source, n.source_id, n.content_hash, ?, now()::TIMESTAMP
                FROM t_new n JOIN entities s ON s.name = n.subject
                JOIN relations r ON r.name = n.relation JOIN entities o ON o.name = n.object""",
                        [f0, load_id])
            con.unregister("t_new")
            vec = np.stack([known_vectors[r[0]] for r in fact_rows])
            tab = _vectors_table(np.arange(f0 + 1, f0 + 1 + len(fact_rows)), vec, "fact_id")
            con.register("t_vec", tab)
            con.execute("INSERT INTO fact_vectors SELECT fact_id, embedding FROM t_vec")
            con.unregister("t_vec")
            added = first(con.execute("SELECT count(*) FROM facts WHERE load_id = ?", [load_id]))[0]
            if added != len(fact_rows):  # the joins above must match every new fact
                raise RuntimeError(f"internal: {added} of {len(fact_rows)} facts stored")
        report.facts_added = len(fact_rows)
        report.entities_added = len(ent_rows)
        report.relations_added = len(rel_rows)
        report.duplicates = report.rows_read - report.rejected - report.facts_added
        con.execute("INSERT INTO loads VALUES (?, now()::TIMESTAMP, ?, ?, ?, ?, ?)",
                    [load_id, report.files, report.rows_read, report.facts_added,
                     report.duplicates, report.rejected])
        if Store.get_meta(con, "model_name") is None:
            Store.set_meta(con, "model_name", identity["name"])
            Store.set_meta(con, "model_dim", str(identity["dim"]))
            Store.set_meta(con, "model_sha256", identity["weights_sha256"])
        if fact_rows:
            version = int(Store.get_meta(con, "facts_version", "0")) + 1
            Store.set_meta(con, "facts_version", str(version))
    return report
