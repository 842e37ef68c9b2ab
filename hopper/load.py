"""Loading fact tables: read CSV/Parquet/JSON Lines with DuckDB, validate, dedupe, embed, store."""
from __future__ import annotations

import codecs
import contextlib
import csv
import difflib
import io
import json
import re
import sys
from dataclasses import dataclass, field
from pathlib import Path

import duckdb

from .errors import InputError
from .files import write_atomic
from .pending import CHUNK, PendingVectors, key_sql, text_key
from .store import Store, first

REQUIRED = ("subject", "relation", "object")
OPTIONAL = ("text", "source", "id")
MAX_NAME = 1_000      # characters in a subject, relation or object
MAX_TEXT = 20_000     # characters in a fact's text
FORMATS = {".csv": "csv", ".tsv": "csv", ".parquet": "parquet", ".jsonl": "json", ".ndjson": "json"}
# White space as Python's str.split() sees it (ASCII, Unicode separators, \v, \x1c-\x1f, NEL),
# so names here and in questions (hopper.questions.check_text) are cleaned the same way.
_SPACE = r"[\s\pZ\x0b\x1c-\x1f\x85]+"
_CSV_READ = ("read_csv(?, header = true, auto_detect = false, columns = ?, delim = ?, skip = ?, "
             "quote = '\"', escape = '\"', strict_mode = true, null_padding = false, comment = '', "
             "store_rejects = true, rejects_table = 'rej_{n}', rejects_scan = 'rejscan_{n}')")


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
    reused: int = 0               # vectors an interrupted run of the same load had saved

    def as_dict(self) -> dict:
        return dict(self.__dict__)


@dataclass
class _Staged:
    """One input file read into the staging table ``raw_{n}(_row, pre, c0, c1, ...)``.

    ``_row`` numbers the records DuckDB read (1, 2, ...), ``pre`` holds a problem the reader
    already found ('field|reason'), and ``c<i>`` is the file's i-th column (``names[i]``) as text.
    """

    path: Path
    kind: str
    names: list[str]
    header_line: int = 0          # the CSV header's line in the file; 0 for other kinds
    delim: str = ","


def _first_line(exc: Exception) -> str:
    text = str(exc)
    text = re.sub(r"^[A-Za-z ]*Error: ", "", text.strip())
    return text.splitlines()[0] if text else type(exc).__name__


def _csv_header(path: Path, delim: str) -> tuple[int, list[str]]:
    """The line number and fields of a CSV file's header: its first non-blank line."""
    with open(path, "rb") as fh:
        for n, raw in enumerate(fh, start=1):
            if n == 1 and raw.startswith(codecs.BOM_UTF8):
                raw = raw[len(codecs.BOM_UTF8):]
            if not raw.strip():
                continue
            try:
                text = raw.decode("utf-8")
            except UnicodeDecodeError:
                raise InputError("is not valid UTF-8 text", file=str(path), line=n,
                                 hint="save the file as UTF-8 and load it again") from None
            try:
                row = next(csv.reader([text], delimiter=delim, quotechar='"', strict=True))
            except (csv.Error, StopIteration) as exc:
                raise InputError(f"the header cannot be read ({exc})", file=str(path), line=n,
                                 hint="the first line must name the columns") from None
            return n, row
    return 0, []


def _line_of_offsets(path: Path, offsets) -> dict[int, int]:
    """Map byte offsets in a file to the 1-based line each falls on."""
    want = sorted(set(offsets))
    out, line, pos, i = {}, 1, 0, 0
    with open(path, "rb") as fh:
        while i < len(want):
            chunk = fh.read(1 << 20)
            if not chunk:
                break
            while i < len(want) and want[i] < pos + len(chunk):
                out[want[i]] = line + chunk.count(b"\n", 0, want[i] - pos)
                i += 1
            line += chunk.count(b"\n")
            pos += len(chunk)
    for off in want[i:]:
        out[off] = line
    return out


def _csv_reject_reason(error_type: str, message: str, n_cols: int) -> str:
    found = re.search(r"Found: (\d+)", message or "")
    if error_type in ("MISSING COLUMNS", "TOO MANY COLUMNS") and found:
        return f"has {found.group(1)} fields where the header has {n_cols}"
    if error_type == "INVALID ENCODING" or "unicode" in (message or "").lower():
        return "is not valid UTF-8 text"
    if error_type == "UNQUOTED VALUE":
        return "has a quote that is not closed, or text after a closing quote"
    if error_type == "LINE SIZE OVER MAXIMUM":
        return "is too long for the CSV reader"
    return (message or error_type).splitlines()[0].rstrip(".")


def _stage_csv(stage, path: Path, n: int, delim: str) -> _Staged:
    header_line, names = _csv_header(path, delim)
    if not names:
        raise InputError("is empty", file=str(path), hint="a fact table needs a header and rows")
    cols = {f"c{i}": "VARCHAR" for i in range(len(names))}
    stage.execute(f"CREATE TABLE raw_{n} AS SELECT row_number() OVER () AS _row, "
                  f"NULL::VARCHAR AS pre, * FROM {_CSV_READ.format(n=n)}",
                  [str(path), cols, delim, header_line - 1])
    # Rows DuckDB's reader refused (wrong field count, bad quoting, invalid UTF-8): one
    # problem per record, at the line where the record starts.
    rejects = stage.execute(
        f"SELECT line_byte_position - 1, arg_min(column_name, column_idx), "
        f"arg_min(error_type, column_idx), arg_min(error_message, column_idx) FROM rej_{n} "
        "GROUP BY ALL ORDER BY 1").fetchall()
    stage.execute("CREATE TABLE IF NOT EXISTS reader_rejects (file_no INTEGER, line BIGINT, "
                  "problem VARCHAR)")
    if rejects:
        lines = _line_of_offsets(path, [r[0] for r in rejects])
        for off, col, etype, msg in rejects:
            col = int(col[1:]) if col and re.fullmatch(r"c\d+", col) else -1
            fld = names[col].strip() if 0 <= col < len(names) and \
                etype not in ("MISSING COLUMNS", "TOO MANY COLUMNS") else ""
            stage.execute("INSERT INTO reader_rejects VALUES (?, ?, ?)",
                          [n, lines[off], f"{fld}|{_csv_reject_reason(etype, msg, len(names))}"])
    return _Staged(path, "csv", names, header_line, delim)


def _stage_json(stage, path: Path, n: int) -> _Staged:
    # Each line is read as one JSON value; a line that is not JSON becomes a NULL row in
    # its place (so rows stay in file order), reported as malformed.
    stage.execute(f"CREATE TABLE raw_{n}_j AS SELECT row_number() OVER () AS _row, json "
                  "FROM read_ndjson_objects(?, ignore_errors = true)", [str(path)])
    keys = [r[0] for r in stage.execute(
        f"SELECT DISTINCT k FROM (SELECT unnest(json_keys(json)) AS k FROM raw_{n}_j "
        "WHERE json_type(json) = 'OBJECT') ORDER BY k").fetchall()]
    keys = [k for k in keys if k]
    cols = "".join(f", json ->> ? AS c{i}" for i in range(len(keys)))
    stage.execute(
        f"CREATE TABLE raw_{n} AS SELECT _row, CASE WHEN json IS NULL THEN '|malformed JSON' "
        "WHEN json_type(json) <> 'OBJECT' THEN '|is not a JSON object' END AS pre"
        f"{cols} FROM raw_{n}_j", ["$." + _json_path_key(k) for k in keys])
    stage.execute(f"DROP TABLE raw_{n}_j")
    return _Staged(path, "json", keys)


def _stage_parquet(stage, path: Path, n: int) -> _Staged:
    names = [r[0] for r in stage.execute("DESCRIBE SELECT * FROM read_parquet(?)",
                                         [str(path)]).fetchall()]
    cols = "".join(f", c{i} VARCHAR" for i in range(len(names)))
    stage.execute(f"CREATE TABLE raw_{n} (_row BIGINT, pre VARCHAR{cols})")
    # Columns are matched by position, so no name from the file is written into SQL.
    stage.execute(f"INSERT INTO raw_{n} SELECT file_row_number + 1, NULL, "
                  "* EXCLUDE (file_row_number) FROM read_parquet(?, file_row_number = true)",
                  [str(path)])
    return _Staged(path, "parquet", names)


def _stage_file(stage, path: Path, n: int) -> _Staged:
    """Read one file into a staging table ``raw_{n}``."""
    if not path.exists():
        raise InputError("no such file", file=str(path))
    if path.is_dir():
        raise InputError("is a folder, not a fact table", file=str(path))
    kind = FORMATS.get(path.suffix.lower())
    if kind is None:
        raise InputError(f"unknown file type '{path.suffix or '(none)'}'", file=str(path),
                         hint="use .csv, .tsv, .parquet, .jsonl or .ndjson")
    try:
        with open(path, "rb") as fh:
            head = fh.read(1 << 16)
    except OSError as exc:
        raise InputError(f"cannot be read: {exc.strerror}", file=str(path)) from None
    blank = not head if kind == "parquet" else (not head.strip() and len(head) < 1 << 16)
    if blank:
        raise InputError("is empty", file=str(path), hint="a fact table needs a header and rows")
    try:
        if kind == "csv":
            return _stage_csv(stage, path, n, "\t" if path.suffix.lower() == ".tsv" else ",")
        if kind == "json":
            return _stage_json(stage, path, n)
        return _stage_parquet(stage, path, n)
    except InputError:
        raise
    except (duckdb.Error, OSError) as exc:
        raise InputError(f"cannot be read as {kind.upper() if kind != 'json' else 'JSON Lines'}: "
                         f"{_first_line(exc)}", file=str(path)) from None


def _json_path_key(k: str) -> str:
    return '"' + k.replace("\\", "\\\\").replace('"', '\\"') + '"'


def _columns(st: _Staged) -> dict[str, str]:
    """Map our column names to the staging table's, matching case and surrounding spaces loosely."""
    found: dict[str, int] = {}
    for i, name in enumerate(st.names):
        key = name.strip().lower()
        if key in REQUIRED + OPTIONAL and key in found:
            raise InputError("the column appears twice", file=str(st.path),
                             line=st.header_line or None, field=key)
        found.setdefault(key, i)
    line = st.header_line or None
    missing = [c for c in REQUIRED if c not in found]
    if missing:
        col = missing[0]
        spare = [k for k in found if k not in REQUIRED + OPTIONAL]
        close = difflib.get_close_matches(col, spare, n=1, cutoff=0.6)
        if close:
            hint = f"found a column '{st.names[found[close[0]]].strip()}': did you mean '{col}'?"
        elif len(st.names) == 1 and any(d in st.names[0] for d in ",;\t|"):
            hint = (f"the header has one column '{st.names[0].strip()}': hopper reads .csv files "
                    "separated by ',' and .tsv files separated by tabs")
        else:
            shown = ", ".join(n.strip() for n in st.names[:10]) or "nothing"
            hint = f"the columns are: {shown}; required: subject, relation, object"
        where = "column" if st.kind != "json" else "key"
        raise InputError(f"missing required {where}", file=str(st.path), line=line,
                         field=col, hint=hint)
    return {c: f"c{found[c]}" for c in REQUIRED + OPTIONAL if c in found}


def _clean(expr: str, name: bool = False) -> str:
    """Text of a cell in Unicode NFC (so one name has one spelling), outer white space trimmed.

    In a name (subject, relation, object) each run of white space also becomes one space, as
    in questions and answers, so a name typed in a question matches the stored one.
    """
    text = f"regexp_replace(CAST({expr} AS VARCHAR), '^{_SPACE}|{_SPACE}$', '', 'g')"
    if name:
        text = f"regexp_replace({text}, '{_SPACE}', ' ', 'g')"
    return f"nfc_normalize({text})"


@contextlib.contextmanager
def _csv_field_limit():
    old = csv.field_size_limit()
    csv.field_size_limit(2**31 - 1)
    try:
        yield
    finally:
        csv.field_size_limit(old)


def _record_lines(st: _Staged, reject_lines: set[int]) -> list[int] | None:
    """The line where each record DuckDB read begins, in order; None if it cannot be told.

    DuckDB numbers records, not lines: a quoted field may span lines, and blank lines are
    skipped.  Python's csv module (the same quoting rules) walks the file to find each
    record's first line; records DuckDB refused are left out, as they are not rows.
    """
    out = []
    try:
        if st.kind == "json":
            with open(st.path, "rb") as fh:
                out = [n for n, raw in enumerate(fh, start=1) if raw.strip()]
            return out
        with _csv_field_limit(), open(st.path, newline="", encoding="utf-8",
                                      errors="replace") as fh:
            reader = csv.reader(fh, delimiter=st.delim, quotechar='"', strict=False)
            prev = 0
            for row in reader:
                start, prev = prev + 1, reader.line_num
                if start > st.header_line and row and start not in reject_lines:
                    out.append(start)
    except (OSError, csv.Error):
        return None
    return out


def _json_problem(raw: bytes) -> str:
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError:
        return "|is not valid UTF-8 text"
    try:
        json.loads(text)
    except ValueError as exc:
        msg = getattr(exc, "msg", str(exc))
        col = getattr(exc, "colno", None)
        return f"|malformed JSON ({msg}{f' at column {col}' if col else ''})"
    return "|malformed JSON"


def _raise_first_malformed(stage, st: _Staged, n: int) -> None:
    """Raise the first line of a JSON Lines file that could not be read as an object."""
    row = first(stage.execute(f"SELECT _row, pre FROM raw_{n} WHERE pre IS NOT NULL "
                              "ORDER BY _row LIMIT 1"))
    if row is None:
        return
    lines = _record_lines(st, set()) or []
    line = lines[row[0] - 1] if row[0] <= len(lines) else None
    problem = row[1]
    if problem == "|malformed JSON" and line is not None:
        with open(st.path, "rb") as fh:
            for k, raw in enumerate(fh, start=1):
                if k == line:
                    problem = _json_problem(raw.rstrip(b"\r\n"))
                    break
    raise InputError(problem.split("|", 1)[1], file=str(st.path), line=line,
                     hint="each line must be one JSON object")


def _fix_lines(stage, staged: list[_Staged]) -> None:
    """Give rows with a problem the real line of the file they came from."""
    import pyarrow as pa

    todo = [r[0] for r in stage.execute(
        "SELECT DISTINCT file_no FROM checked WHERE problem IS NOT NULL AND _row IS NOT NULL "
        "ORDER BY 1").fetchall()]
    for n in todo:
        st = staged[n]
        if st.kind == "parquet":
            continue  # a row number is all a Parquet file has
        rejects = {r[0] for r in stage.execute(
            "SELECT line FROM reader_rejects WHERE file_no = ?", [n]).fetchall()}
        lines = _record_lines(st, rejects)
        count = first(stage.execute(f"SELECT count(*) FROM raw_{n}"))[0]
        if lines is None or len(lines) != count:
            continue  # keep the record number plus the header
        stage.register("line_map", pa.table({"_row": pa.array(range(1, count + 1), pa.int64()),
                                             "line": pa.array(lines, pa.int64())}))
        stage.execute("UPDATE checked SET line = m.line FROM line_map m "
                      "WHERE checked.file_no = ? AND checked._row = m._row", [n])
        stage.unregister("line_map")
        if st.kind == "json":  # say what is wrong with each malformed line
            bad = {r[0]: r[1] for r in stage.execute(
                "SELECT line, _row FROM checked WHERE file_no = ? AND problem = '|malformed JSON'",
                [n]).fetchall()}
            if bad:
                with open(st.path, "rb") as fh:
                    for k, raw in enumerate(fh, start=1):
                        if k in bad:
                            stage.execute("UPDATE checked SET problem = ? WHERE file_no = ? "
                                          "AND _row = ?", [_json_problem(raw.rstrip(b"\r\n")), n,
                                                           bad[k]])


def stage_files(paths: list[Path]):
    """Read and validate every file into an in-memory DuckDB; return the staging connection.

    Tables: ``rows`` (every record read), ``checked`` (rows with their first problem, as
    'field|reason', or NULL) and ``valid`` (good rows, one per distinct fact).
    """
    stage = duckdb.connect()
    stage.execute("CREATE TABLE reader_rejects (file_no INTEGER, line BIGINT, problem VARCHAR)")
    stage.execute("CREATE TABLE files (file_no INTEGER, file VARCHAR)")
    staged, parts = [], []
    for n, path in enumerate(paths):
        st = _stage_file(stage, path, n)
        staged.append(st)
        stage.execute("INSERT INTO files VALUES (?, ?)", [n, str(path)])
        try:
            cols = _columns(st)
        except InputError:
            # A key no line has may only be on the lines that could not be read: say so.
            if st.kind == "json":
                _raise_first_malformed(stage, st, n)
            raise
        count = first(stage.execute(f"SELECT (SELECT count(*) FROM raw_{n}) + (SELECT count(*) "
                                    "FROM reader_rejects WHERE file_no = ?)", [n]))[0]
        if count == 0:
            raise InputError("has a header but no rows" if st.kind == "csv" else "has no rows",
                             file=str(path))
        get = {c: (_clean(cols[c], name=c in REQUIRED) if c in cols else "NULL")
               for c in REQUIRED + OPTIONAL}
        parts.append(f"""
            SELECT {n} AS file_no, _row, _row + {st.header_line} AS line, pre,
                   {get['subject']} AS subject, {get['relation']} AS relation,
                   {get['object']} AS object, {get['text']} AS text,
                   {get['source']} AS source, {get['id']} AS source_id
            FROM raw_{n}""")
    parts.append("SELECT file_no, NULL, line, problem, NULL, NULL, NULL, NULL, NULL, NULL "
                 "FROM reader_rejects")
    stage.execute("CREATE TABLE rows_ AS " + " UNION ALL ".join(parts))
    stage.execute("CREATE TABLE rows AS SELECT f.file, r.* FROM rows_ r JOIN files f USING (file_no)")
    stage.execute("DROP TABLE rows_")
    checks = ["WHEN pre IS NOT NULL THEN pre"]
    for c in REQUIRED:
        checks.append(f"WHEN {c} IS NULL OR {c} = '' THEN '{c}|blank or missing value'")
        checks.append(f"WHEN length({c}) > {MAX_NAME} THEN '{c}|longer than {MAX_NAME} characters'")
    checks.append(f"WHEN length(text) > {MAX_TEXT} THEN 'text|longer than {MAX_TEXT} characters'")
    stage.execute(f"""
        CREATE TABLE checked AS
        SELECT *, CASE {' '.join(checks)} ELSE NULL END AS problem FROM rows""")
    _fix_lines(stage, staged)
    stage.execute("""
        CREATE TABLE valid AS
        SELECT file_no, line, subject, relation, object,
               coalesce(nullif(text, ''), subject || ' ' || replace(relation, '_', ' ') || ' ' || object) AS text,
               nullif(source, '') AS source, nullif(source_id, '') AS source_id,
               sha256(subject || chr(31) || relation || chr(31) || object) AS content_hash
        FROM checked WHERE problem IS NULL
        QUALIFY row_number() OVER (PARTITION BY content_hash ORDER BY file_no, _row) = 1""")
    return stage


def _write_rejected(stage, paths: list[Path]) -> list[str]:
    """Write each input's rejected rows, with the reason, to ``<name>.rejected.csv`` beside it."""
    written = []
    for n, path in enumerate(paths):
        rows = stage.execute(
            "SELECT line, split_part(problem, '|', 1), substr(problem, strpos(problem, '|') + 1), "
            "subject, "
            "relation, object, text, source, source_id FROM checked "
            "WHERE file_no = ? AND problem IS NOT NULL ORDER BY line", [n]).fetchall()
        if not rows:
            continue
        out = path.with_name(path.name + ".rejected.csv")  # beside the input, whatever its name
        buf = io.StringIO(newline="")
        w = csv.writer(buf)
        w.writerow(["line", "field", "reason", "subject", "relation", "object", "text",
                    "source", "id"])
        w.writerows(rows)
        # a new file renamed into place: never half written, never through a planted link
        write_atomic(out, buf.getvalue().encode("utf-8"))
        written.append(str(out))
    return written


def store_precision(con) -> str | None:
    """The encoder precision that made the store's vectors; None before its first load.
    Stores made before precisions were recorded hold fp32 vectors."""
    if Store.get_meta(con, "model_name") is None:
        return None
    return Store.get_meta(con, "model_precision", "fp32")


def check_model(con, identity: dict, path, precision: str) -> None:
    """Refuse to mix vectors of two embedding models, or of two precisions, in one store.

    int8 vectors are 0.97 (worst) from fp32 ones in cosine, not the 0.999 within which the
    fast and reference encoders count as one; a store keeps the precision it began with."""
    name = Store.get_meta(con, "model_name")
    if name is None:
        return
    stored = store_precision(con)
    if stored != precision:
        raise InputError(
            f"the store's vectors were made by the {stored} encoder, but this load would embed "
            f"with the {precision} one; vectors of two precisions are not mixed", file=str(path),
            hint=f"load with the {stored} encoder (hopper load picks it when it can be made), "
                 "or into a new store")
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
    # The store's own precision, or for a first load the load precision (int8).
    stored = None
    if store.exists():
        with store.connect() as con:
            stored = store_precision(con)
    if encoder is None:
        encoder = embed.Encoder("auto", precision=stored or embed.LOAD_PRECISION)
    precision = getattr(encoder, "precision", "fp32")
    accounted: set[str] = set()  # texts counted as embedded or reused by this load
    pending = PendingVectors(store.path, identity["weights_sha256"], precision)

    def new_items(con):
        stage.execute("CREATE OR REPLACE TABLE have_hash (content_hash VARCHAR)")
        stage.execute("CREATE OR REPLACE TABLE have_entity (name VARCHAR)")
        stage.execute("CREATE OR REPLACE TABLE have_relation (name VARCHAR)")
        if con is not None:
            hashes = stage.sql("SELECT content_hash FROM valid").to_arrow_table()
            con.register("incoming", hashes)
            # found, ents and rels are read by name in the SQL below (replacement scans)
            found = con.sql("SELECT content_hash FROM facts JOIN incoming USING (content_hash)"
                            ).to_arrow_table()  # noqa: F841
            ents = con.sql("SELECT name FROM entities").to_arrow_table()  # noqa: F841
            rels = con.sql("SELECT name FROM relations").to_arrow_table()  # noqa: F841
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
        if not texts:
            return
        # Shortest first: a chunk holds texts of similar length, so its batches pad little.
        todo = sorted(set(texts), key=lambda t: (len(t), t))
        # The saved chunks are the truth, not memory: vectors an interrupted run of this load
        # saved are reused, and in the write transaction this also finds any chunk a load
        # that committed in between took away.  The rest is embedded in chunks, each saved
        # beside the store as soon as it is done (see hopper/pending.py).
        keys = [text_key(t) for t in todo]
        saved = pending.keys(set(keys))
        report.reused += sum(1 for t, k in zip(todo, keys) if k in saved and t not in accounted)
        accounted.update(todo)
        todo = [t for t, k in zip(todo, keys) if k not in saved]
        if not todo:
            return
        bar = _progress_bar(progress, len(todo))
        try:
            for a in range(0, len(todo), CHUNK):
                chunk = todo[a:a + CHUNK]
                pending.save(chunk, encoder.encode(chunk))
                report.embedded += len(chunk)
                if bar is not None:
                    bar.update(len(chunk))
        finally:
            if bar is not None:
                bar.close()

    if store.exists():
        with store.connect() as con:
            check_model(con, identity, store.path, precision)
            new_items(con)
    else:
        new_items(None)
    created = not store.exists()
    try:
        embed_missing()
        # Phase B: one short write transaction; recheck what is new in case another load landed.
        _write(store, stage, report, identity, precision, new_items, embed_missing, pending)
    except BaseException:
        if not pending.resumable:
            pending.clear()  # a private folder: nothing can resume from it
        if created:  # the store did not exist before this command: leave no empty file behind
            for p in (store.path, *(Path(str(store.path) + x) for x in (".wal", ".gate", ".lock"))):
                try:
                    p.unlink()
                except OSError:
                    pass
        raise
    return report


def _progress_bar(progress: bool, total: int):
    if not (progress and total and sys.stderr is not None and sys.stderr.isatty()):
        return None
    try:
        from tqdm import tqdm
    except ImportError:
        return None
    return tqdm(total=total, desc="embedding", unit="text", file=sys.stderr)


LOAD_MEMORY_LIMIT = "1GB"  # DuckDB's buffers during a load's write transaction


def _write(store, stage, report, identity, precision, new_items, embed_missing, pending):
    """Phase B of a load: one write transaction with everything new.  The vectors come from
    the pending chunks on disk, joined to the new rows by text key inside DuckDB (never
    through Python), and DuckDB's memory is capped, so a load's memory stays bounded."""
    # committed: the vectors are in the store; their chunks go while the lock is still held,
    # so a load waiting for it never lists a chunk that then vanishes
    with store.transaction(after_commit=pending.clear) as con:
        # DuckDB holds a transaction's new rows in memory up to its limit (80% of RAM by
        # default), then spills to STORE.tmp: a load stays near 3 GB at a million facts.
        con.execute(f"SET memory_limit = '{LOAD_MEMORY_LIMIT}'")
        check_model(con, identity, store.path, precision)
        new_items(con)
        embed_missing()
        e0, r0, f0, l0 = first(con.execute(
            "SELECT coalesce((SELECT max(entity_id) FROM entities), 0), "
            "coalesce((SELECT max(relation_id) FROM relations), 0), "
            "coalesce((SELECT max(fact_id) FROM facts), 0), "
            "coalesce((SELECT max(load_id) FROM loads), 0)"))
        load_id = l0 + 1
        vectors = pending.sql_source(con)
        n_ent = n_rel = 0
        for table, id_col, first_id, sql, text in (
                ("entities", "entity_id", e0, "SELECT name FROM new_entities ORDER BY k", "name"),
                ("relations", "relation_id", r0, "SELECT name FROM new_relations ORDER BY k",
                 "replace(name, '_', ' ')")):
            # new ids in first-seen order; the key is that of the embedded text
            rows = stage.sql(f"SELECT {first_id} + row_number() OVER () AS id, name, "
                             f"{key_sql(text)} AS key FROM ({sql})").to_arrow_table()
            if not len(rows):
                continue
            con.register("t_new_names", rows)
            con.execute(f"INSERT INTO {table} ({id_col}, name, embedding) SELECT t.id, t.name, "
                        f"v.embedding FROM t_new_names t JOIN {vectors} v USING (key)")
            con.unregister("t_new_names")
            _require_all(con, f"SELECT count(*) FROM {table} WHERE {id_col} > ?", first_id,
                         len(rows), table)
            n_ent, n_rel = (len(rows), n_rel) if table == "entities" else (n_ent, len(rows))
        n_facts = first(stage.execute("SELECT count(*) FROM new_facts"))[0]
        if n_facts:
            nf = stage.sql("SELECT row_number() OVER (ORDER BY file_no, line) AS ord, subject, "
                           "relation, object, text, source, source_id, content_hash FROM new_facts"
                           ).to_arrow_table()
            con.register("t_new", nf)
            con.execute("""
                INSERT INTO facts SELECT ? + n.ord AS fact_id,
                    s.entity_id, r.relation_id, o.entity_id, n.subject, n.relation, n.object,
                    n.text, n.source, n.source_id, n.content_hash, ?, now()::TIMESTAMP
                FROM t_new n JOIN entities s ON s.name = n.subject
                JOIN relations r ON r.name = n.relation JOIN entities o ON o.name = n.object""",
                        [f0, load_id])
            con.unregister("t_new")
            del nf
            _require_all(con, "SELECT count(*) FROM facts WHERE load_id = ?", load_id, n_facts,
                         "facts")
            con.execute(f"INSERT INTO fact_vectors SELECT f.fact_id, v.embedding FROM facts f "
                        f"JOIN {vectors} v ON v.key = {key_sql('f.text')} WHERE f.load_id = ?",
                        [load_id])
            _require_all(con, "SELECT count(*) FROM fact_vectors WHERE fact_id > ?", f0, n_facts,
                         "fact vectors")
        report.facts_added = n_facts
        report.entities_added = n_ent
        report.relations_added = n_rel
        report.duplicates = report.rows_read - report.rejected - report.facts_added
        con.execute("INSERT INTO loads VALUES (?, now()::TIMESTAMP, ?, ?, ?, ?, ?)",
                    [load_id, report.files, report.rows_read, report.facts_added,
                     report.duplicates, report.rejected])
        if Store.get_meta(con, "model_name") is None:
            Store.set_meta(con, "model_name", identity["name"])
            Store.set_meta(con, "model_dim", str(identity["dim"]))
            Store.set_meta(con, "model_sha256", identity["weights_sha256"])
            Store.set_meta(con, "model_precision", precision)
        if n_facts:
            version = int(Store.get_meta(con, "facts_version", "0")) + 1
            Store.set_meta(con, "facts_version", str(version))


def _require_all(con, count_sql: str, arg, want: int, what: str) -> None:
    """The joins of ``_write`` must match every new row (a missing vector would drop one)."""
    got = first(con.execute(count_sql, [arg]))[0]
    if got != want:
        raise RuntimeError(f"internal: {got} of {want} {what} stored")
