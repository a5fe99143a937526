"""Screen an upload's bytes before a parser sees them: line ends, UTF-8, and the shape of NDJSON rows.

Why: the parsers are fast but trust their input. A body whose lines end in a bare carriage return,
that is not UTF-8, or whose JSON rows nest thousands of levels deep or carry tens of thousands of
keys either crashes a reader (a 500) or costs time that grows with the square of the nesting.
Each screen here is linear, bounded in memory (it walks the body in blocks, carrying its state
across them, so a streaming reader can feed it batch by batch) and records a problem that names
the line instead of raising. Pure: bytes in, `Problems` out.

Row numbers follow `Problems`: 1-based data rows, so for CSV the header line is row 0 and for
NDJSON the first line is row 1 (a CSV field that holds a line break shifts the count; the number
is then the physical line).
"""

from __future__ import annotations

import codecs
from collections.abc import Iterable

import numpy as np

from .problems import Problems

MAX_JSON_DEPTH = 32  # rows are flat objects; nested values in ignored keys may go this deep
MAX_FIELDS = 1000  # columns in a CSV header, keys in one NDJSON row (a declaration has < 400)
MAX_LINE_BYTES = 1 << 20  # one NDJSON row; the reader's block must hold a whole line
_BLOCK = 4 << 20  # bytes screened at a time

_QUOTE, _BACKSLASH, _NL, _COLON = ord('"'), ord("\\"), ord("\n"), ord(":")
_OPEN = np.zeros(256, dtype=np.int8)
_OPEN[[ord("{"), ord("[")]] = 1
_OPEN[[ord("}"), ord("]")]] = -1


def _blocks(body: bytes) -> Iterable[bytes]:
    view = memoryview(body)
    for start in range(0, len(body), _BLOCK):
        yield bytes(view[start : start + _BLOCK])


def _row_of(line: int, fmt: str) -> int:
    """1-based data row of a 0-based physical line (CSV's line 0 is the header, row 0)."""
    return line if fmt == "csv" else line + 1


def check_line_ends(body: bytes, fmt: str, problems: Problems) -> None:
    """Refuse carriage returns used alone as line ends (RFC 4180 ends CSV lines with CRLF; NDJSON
    lines end with LF, optionally preceded by CR): the first line must not hold a bare CR."""
    end = body.find(b"\n")
    first = body if end < 0 else body[:end]
    if b"\r" in first.rstrip(b"\r"):
        problems.add(
            None,
            "lines end with a bare carriage return (\\r); end lines with \\n or \\r\\n",
            rows=[_row_of(0, fmt)] if fmt != "csv" else [],
        )


class Utf8Screen:
    """Incremental UTF-8 validation that reports the first bad line (`feed` blocks, then `close`)."""

    def __init__(self, fmt: str, problems: Problems):
        self.fmt, self.problems = fmt, problems
        self._decoder = codecs.getincrementaldecoder("utf-8")("strict")
        self._lines = 0  # newlines in the blocks already accepted
        self.failed = False

    def feed(self, block: bytes, final: bool = False) -> None:
        if self.failed:
            return
        try:
            self._decoder.decode(block, final)
        except UnicodeDecodeError as exc:
            self.failed = True
            line = self._lines + block.count(b"\n", 0, max(exc.start, 0))
            bad = block[max(exc.start, 0) : max(exc.start, 0) + 4]
            header = self.fmt == "csv" and line == 0
            self.problems.add(
                None,
                f"{'the header' if header else 'a row'} is not valid UTF-8 (byte {bad[:1].hex()!r} "
                "cannot start or continue a character); send UTF-8 text",
                rows=[] if header else [_row_of(line, self.fmt)],
                values=[bad.decode("utf-8", "backslashreplace")],
                count=1,
            )
            return
        self._lines += block.count(b"\n")

    def close(self) -> None:
        self.feed(b"", final=True)


class JsonShapeScreen:
    """Nesting depth, keys per row and bytes per row of NDJSON (`feed` blocks, then `close`).

    Blocks are cut at line feeds (the unfinished last line waits for the next block), so every
    line is judged whole. First a cheap bound per line: opening braces and brackets bound the
    depth, colons bound the keys. Only a line whose bound exceeds a cap is scanned exactly,
    string-aware and vectorised: quotes preceded by an even run of backslashes open or close
    strings; braces and brackets outside strings move the depth; colons at depth 1 outside strings
    count the row's keys. Lines are independent, so one malformed row cannot spill into the next
    (the JSON reader reports it)."""

    def __init__(self, problems: Problems, *, max_depth: int = MAX_JSON_DEPTH,
                 max_fields: int = MAX_FIELDS, max_line_bytes: int = MAX_LINE_BYTES):  # fmt: skip
        self.problems = problems
        self.max_depth, self.max_fields, self.max_line_bytes = max_depth, max_fields, max_line_bytes
        self._line = 0  # 0-based index of the first line of the next chunk
        self._tail = b""  # the unfinished last line
        self.failed = False

    def _fail(self, line: int, problem: str) -> None:
        self.failed = True
        self.problems.add(None, problem, rows=[line + 1], count=1)

    def feed(self, block: bytes) -> None:
        if self.failed:
            return
        data = self._tail + block if self._tail else block
        cut = data.rfind(b"\n") + 1
        self._tail = data[cut:]
        if cut:
            self._lines(data[:cut])
        if not self.failed and len(self._tail) > self.max_line_bytes:
            self._fail(self._line, f"a row is longer than {self.max_line_bytes} bytes")

    def close(self) -> None:
        if not self.failed and self._tail.strip():
            self._lines(self._tail + b"\n")
        self._tail = b""

    def _lines(self, chunk: bytes) -> None:
        """Judge whole lines (`chunk` ends with a line feed)."""
        b = np.frombuffer(chunk, dtype=np.uint8)
        ends = np.flatnonzero(b == _NL)
        lengths = np.diff(ends, prepend=-1) - 1
        long = np.flatnonzero(lengths > self.max_line_bytes)
        if long.size:
            self._fail(
                self._line + int(long[0]), f"a row is longer than {self.max_line_bytes} bytes"
            )
            return
        n_lines = ends.shape[0]
        opens = np.bincount(np.searchsorted(ends, np.flatnonzero(_OPEN[b] > 0)), minlength=n_lines)
        colons = np.bincount(np.searchsorted(ends, np.flatnonzero(b == _COLON)), minlength=n_lines)
        suspect = np.flatnonzero((opens > self.max_depth) | (colons > self.max_fields))
        for k in suspect:  # only lines that might break a cap are scanned exactly
            start = int(ends[k - 1]) + 1 if k else 0
            problem = self._exact(b[start : int(ends[k])])
            if problem:
                self._fail(self._line + int(k), problem)
                return
        self._line += n_lines

    def _exact(self, b: np.ndarray) -> str | None:
        """The cap one line breaks, or None; `b` is the line's bytes."""
        n = b.shape[0]
        pos = np.arange(n, dtype=np.int64)
        last_plain = np.maximum.accumulate(np.where(b == _BACKSLASH, -1, pos))
        run = np.zeros(n, dtype=np.int64)  # backslashes right before each byte
        run[1:] = np.where(last_plain[:-1] >= 0, pos[1:] - 1 - last_plain[:-1], pos[1:])
        quote = (b == _QUOTE) & (run % 2 == 0)
        outside = (np.cumsum(quote) % 2 == 0) & ~quote  # not in a string, not a delimiter
        depth = np.cumsum(np.where(outside, _OPEN[b], 0).astype(np.int64))
        if n and depth.max() > self.max_depth:
            return f"a row nests deeper than {self.max_depth} levels"
        if int((outside & (b == _COLON) & (depth == 1)).sum()) > self.max_fields:
            return f"a row has more than {self.max_fields} keys"
        return None


def screen_text(body: bytes, fmt: str, problems: Problems) -> None:
    """Run the screens a text format needs (CSV, NDJSON); Parquet is binary and self-describing."""
    screen_blocks(_blocks(body), fmt, problems)


def screen_file(path: str, fmt: str, problems: Problems) -> None:
    """The same screens over an upload spooled to disk, read a block at a time (memory bounded)."""

    def blocks() -> Iterable[bytes]:
        with open(path, "rb") as f:
            while block := f.read(_BLOCK):
                yield block

    screen_blocks(blocks(), fmt, problems)


def screen_blocks(blocks: Iterable[bytes], fmt: str, problems: Problems) -> None:
    """Line ends (judged on the first block's first line), UTF-8 and, for NDJSON, nesting and
    width, fed block by block; stops at the first block that finds a problem."""
    if fmt not in ("csv", "ndjson"):
        return
    utf8 = Utf8Screen(fmt, problems)
    shape = JsonShapeScreen(problems) if fmt == "ndjson" else None
    first = True
    for block in blocks:
        if first:
            check_line_ends(block, fmt, problems)
            if problems:
                return
            first = False
        utf8.feed(block)
        if shape is not None:
            shape.feed(block)
        if problems:
            return
    utf8.close()
    if shape is not None:
        shape.close()


def check_names(names: list[str], problems: Problems) -> None:
    """Column names must be usable as text anywhere (no NUL or other control characters), and an
    upload holds at most MAX_FIELDS columns."""
    if len(names) > MAX_FIELDS:
        problems.add(None, f"the upload has {len(names)} columns; at most {MAX_FIELDS} are read")
    bad = [n for n in names if any(ord(ch) < 32 or ch == "\x7f" for ch in n)]
    if bad:
        problems.add(
            None,
            "column names hold control characters (NUL, line breaks, ...): "
            + ", ".join(repr(n) for n in bad[:5]),
        )
