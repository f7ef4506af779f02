"""Read a record file into a YAML node tree with positions, with bounded work.

Only the YAML *composer* runs (``yaml.SafeLoader``): no object construction, no tags that
build Python objects, nothing executed. Before composing, the token stream is scanned
iteratively to bound nesting depth and the number of aliases, so that hostile files cannot
exhaust the recursion limit or expand exponentially.
"""

from __future__ import annotations

from dataclasses import dataclass

import yaml

from .errors import RecordProblem

MAX_FILE_BYTES = 256 * 1024
MAX_DEPTH = 24
MAX_ALIASES = 64

_OPEN = (yaml.BlockMappingStartToken, yaml.BlockSequenceStartToken,
         yaml.FlowMappingStartToken, yaml.FlowSequenceStartToken)
_CLOSE = (yaml.BlockEndToken, yaml.FlowMappingEndToken, yaml.FlowSequenceEndToken)


@dataclass(frozen=True, slots=True)
class Document:
    """A composed YAML document: the root node and the file text it came from."""

    root: yaml.Node
    text: str
    data: bytes


class YamlProblem(Exception):
    def __init__(self, problem: RecordProblem):
        super().__init__(str(problem))
        self.problem = problem


def _problem(path: str, line: int, column: int, message: str) -> YamlProblem:
    return YamlProblem(RecordProblem(path=path, line=line, column=column, key="", message=message))


def read_document(path: str, data: bytes) -> Document:
    """Compose ``data`` (the bytes of ``path``) into one YAML node tree.

    Raises :class:`YamlProblem` for files that are too large, not UTF-8, not YAML, nested
    too deeply, alias-heavy, or hold more or less than one document.
    """
    if len(data) > MAX_FILE_BYTES:
        raise _problem(path, 0, 0, f"file is {len(data)} bytes; a record may be at most "
                       f"{MAX_FILE_BYTES} bytes (split the fleet into one loop per file)")
    try:
        text = data.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise _problem(path, 0, 0, f"file is not UTF-8 text (byte {exc.start}); save it as UTF-8") \
            from None
    if "\x00" in text:
        raise _problem(path, 0, 0, "file contains a NUL byte; a record is plain UTF-8 text")
    depth = aliases = 0
    try:
        for token in yaml.scan(text, Loader=yaml.SafeLoader):
            if isinstance(token, _OPEN):
                depth += 1
                if depth > MAX_DEPTH:
                    m = token.start_mark
                    raise _problem(path, m.line + 1, m.column + 1,
                                   f"nesting deeper than {MAX_DEPTH} levels; a loop record "
                                   "needs only a few levels")
            elif isinstance(token, _CLOSE):
                depth -= 1
            elif isinstance(token, yaml.AliasToken):
                aliases += 1
                if aliases > MAX_ALIASES:
                    m = token.start_mark
                    raise _problem(path, m.line + 1, m.column + 1,
                                   f"more than {MAX_ALIASES} YAML aliases; write the values out")
        loader = yaml.SafeLoader(text)
        try:
            if not loader.check_node():
                raise _problem(path, 1, 1, "file is empty; a record starts with 'loopvet: 1'")
            root = loader.get_node()
            if loader.check_node():
                nxt = loader.get_node()
                m = nxt.start_mark if nxt is not None else loader.get_mark()
                raise _problem(path, m.line + 1, m.column + 1,
                               "file holds more than one YAML document; keep one loop per file")
        finally:
            loader.dispose()
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        line, col = (mark.line + 1, mark.column + 1) if mark is not None else (0, 0)
        what = exc.problem or exc.context or "malformed YAML"
        raise _problem(path, line, col, f"not valid YAML: {what} (check indentation, colons "
                       "and quotes near here)") from None
    except yaml.YAMLError as exc:
        raise _problem(path, 0, 0, f"not valid YAML: {exc}") from None
    if root is None:
        raise _problem(path, 1, 1, "file is empty; a record starts with 'loopvet: 1'")
    return Document(root=root, text=text, data=data)
