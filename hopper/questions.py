"""Question files: JSON Lines of questions in words or completion questions, validated line by line."""
from __future__ import annotations

import json
import unicodedata
from dataclasses import dataclass, field
from pathlib import Path

from .errors import InputError

MAX_QUESTION = 2_000  # characters; longer text is almost surely a wrong file


@dataclass
class Question:
    """One question: words, or a (subject, relation) completion query, with gold answers."""

    text: str
    answers: list[str] = field(default_factory=list)
    subject: str | None = None
    relation: str | None = None
    hops: int | None = None
    line: int | None = None

    @property
    def is_completion(self) -> bool:
        return self.subject is not None


def check_text(text: str, where: str = "question", file=None, line=None) -> str:
    """Validate a question's words: not blank, not absurdly long."""
    if not isinstance(text, str):
        raise InputError("must be a string", file=file, line=line, field=where)
    text = unicodedata.normalize("NFC", " ".join(text.split()))  # as the loader stores names
    if not text:
        raise InputError("is empty", file=file, line=line, field=where,
                         hint="ask a question in words, or give --subject and --relation")
    if len(text) > MAX_QUESTION:
        raise InputError(f"is longer than {MAX_QUESTION} characters", file=file, line=line,
                         field=where)
    return text


def make_question(obj: dict, file=None, line=None, need_answer: bool = True) -> Question:
    """Validate one decoded JSON object into a Question."""
    if not isinstance(obj, dict):
        raise InputError("is not a JSON object", file=file, line=line)
    subject = obj.get("subject")
    relation = obj.get("relation")
    if subject is not None or relation is not None:
        subject = check_text(subject, "subject", file, line) if subject is not None else None
        relation = check_text(relation, "relation", file, line) if relation is not None else None
        if subject is None or relation is None:
            raise InputError("a completion question needs both 'subject' and 'relation'",
                             file=file, line=line, field="relation" if relation is None else "subject")
    text = obj.get("question")
    if text is None and subject is None:
        raise InputError("missing", file=file, line=line, field="question",
                         hint="each line needs 'question', or 'subject' and 'relation'")
    text = check_text(text, "question", file, line) if text is not None else \
        f"{subject} {relation.replace('_', ' ')}?"
    answers: list[str] = []
    if "answer" not in obj:
        if need_answer:
            raise InputError("missing", file=file, line=line, field="answer",
                             hint="give the correct answer as a string or a list of strings")
    else:
        ans = obj["answer"]
        if isinstance(ans, str):
            ans = [ans]
        if not isinstance(ans, list) or not ans or not all(isinstance(a, str) and a.strip() for a in ans):
            raise InputError("must be a non-empty string or a list of non-empty strings",
                             file=file, line=line, field="answer")
        answers = [unicodedata.normalize("NFC", " ".join(a.split())) for a in ans]
    hops = obj.get("hops")
    hops = hops if isinstance(hops, int) and not isinstance(hops, bool) else None
    return Question(text, answers, subject, relation, hops, line)


def read_questions(path, need_answer: bool = True) -> list[Question]:
    """Read a JSON Lines question file; any bad line refuses the whole file, naming the line."""
    path = Path(path)
    if not path.exists():
        raise InputError("no such file", file=str(path))
    if path.is_dir():
        raise InputError("is a folder, not a question file", file=str(path))
    try:
        data = path.read_bytes()
    except OSError as exc:
        raise InputError(f"cannot be read: {exc.strerror}", file=str(path)) from None
    out = []
    for n, raw in enumerate(data.split(b"\n"), start=1):
        try:
            line = raw.decode("utf-8-sig" if n == 1 else "utf-8")  # a byte-order mark is allowed
        except UnicodeDecodeError:
            raise InputError("is not valid UTF-8", file=str(path), line=n,
                             hint="save the file as UTF-8") from None
        if not line.strip():
            continue
        try:
            obj = json.loads(line)
        except json.JSONDecodeError as exc:
            raise InputError(f"malformed JSON ({exc.msg} at column {exc.colno})", file=str(path),
                             line=n, hint="each line must be one JSON object") from None
        out.append(make_question(obj, file=str(path), line=n, need_answer=need_answer))
    if not out:
        raise InputError("has no questions", file=str(path))
    return out
