"""Path -> validated :class:`Record`, or every problem found in it."""

from __future__ import annotations

import hashlib

from .errors import RecordInvalid
from .format import RECORD, build_record
from .model import Record
from .params import derived_order
from .schema import BAD, Walk
from .yamlio import YamlProblem, read_document


def parse_record(path: str, data: bytes) -> Record:
    """Validate the bytes of one record file.

    Raises :class:`RecordInvalid` listing every problem found (type errors, unknown keys,
    broken expressions, cross-key rules, derived-parameter cycles).
    """
    try:
        doc = read_document(path, data)
    except YamlProblem as exc:
        raise RecordInvalid([exc.problem]) from None
    w = Walk(path=path)
    w.visit(doc.root, "")
    value = RECORD.load(doc.root, w, "")
    if w.problems or value is BAD:
        raise RecordInvalid(w.problems)
    record = build_record(value, w, text=doc.text, sha256=hashlib.sha256(data).hexdigest())
    derived_order(record)
    return record


def read_record(path: str) -> Record:
    """Read and validate the record file at ``path``."""
    with open(path, "rb") as fh:
        data = fh.read(8 * 1024 * 1024)
    return parse_record(path, data)
