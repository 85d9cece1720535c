"""CSV record shapes against RFC 4180, and text checks, over bytes with vectorized numpy operations.

`shape` reads the records of a CSV body in one pass, a chunk of bytes at a
time: every record has as many fields as the header, quotes open a field or
close one, no NUL bytes, no bare carriage returns, valid text. Bad records
come back with their row numbers, byte ranges and reasons (`Shape`); blank
lines are skipped. `repaired` replaces bad records with empty ones so that a
reader keeps the row numbering. `runner.io.inputfiles` decides which file gets
which check.
"""

from __future__ import annotations

import codecs
import mmap
import os
import threading
from dataclasses import dataclass
from functools import lru_cache
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    import numpy as np


LF, CR, NUL = 10, 13, 0  # byte values
CHUNK = 1 << 19  # bytes looked at per vectorized step (its temporary arrays stay below glibc's mmap threshold)
SMALL = 64 << 10  # files up to this size are read whole, and small CSV files read together
# reasons a CSV record is bad, most telling first
QUOTE_INSIDE, QUOTE_AFTER, QUOTE_OPEN, HAS_NUL, NOT_TEXT, BARE_CR, FIELDS = range(7)
NOT_BAD = 255
_COLLECTED = threading.local()
_HIGH = 0x8080808080808080



def reason_text(code: int, fields: int, expected: int, encoding: str) -> str:
    """The reason a bad record gives in messages and in the quarantine file."""
    return {
        QUOTE_INSIDE: "a quote inside an unquoted field",
        QUOTE_AFTER: "text after the closing quote of a field",
        QUOTE_OPEN: "a quoted field that is never closed",
        HAS_NUL: "NUL bytes (a damaged or zero-padded file?)",
        NOT_TEXT: f"bytes that are not valid {encoding} (declare the file's encoding: on the input)",
        BARE_CR: "a carriage return that does not end the line",
        FIELDS: f"{fields} field{'s' if fields != 1 else ''}, the header has {expected}",
    }[code]


@dataclass(frozen=True)
class Shape:
    """The records of a CSV file after its header, as polars numbers them."""

    rows: int  # records, blank ones included
    skip: np.ndarray  # sorted row numbers that are not data: blank and bad records
    bad_rows: np.ndarray  # row numbers of bad records
    bad_start: np.ndarray  # their byte ranges [start, end) in the text
    bad_end: np.ndarray
    bad_code: np.ndarray  # their reasons (QUOTE_INSIDE ... FIELDS)
    bad_fields: np.ndarray  # their field counts (outside quotes)
    copy_needed: bool  # polars cannot read some bad record (its quotes or text): read a repaired copy


def _ascii(a: np.ndarray) -> bool:
    """Whether no byte of `a` is above 0x7F (an OR over 8-byte words)."""
    import numpy as np

    whole = len(a) // 8 * 8
    words = int(np.bitwise_or.reduce(a[:whole].view(np.uint64))) if whole else 0
    tail = int(a[whole:].max()) if whole < len(a) else 0
    return not (words & _HIGH or tail & 0x80)


def _collect(exc: UnicodeError) -> tuple[str, int]:
    assert isinstance(exc, UnicodeDecodeError)
    _COLLECTED.positions.append(exc.start)
    return "", exc.end


codecs.register_error("weir-collect", _collect)


def span_end(text: bytes | bytearray | mmap.mmap, arr: np.ndarray, lo: int, stop: int) -> int:
    """Where a chunk of text from `lo` should end, at most `CHUNK` on and never after `stop`:
    after a line feed when there is one, else before the first byte of a UTF-8 sequence."""
    hi = min(lo + CHUNK, stop)
    if hi >= stop:
        return stop
    cut = text.rfind(b"\n", lo, hi)
    if cut >= lo:
        return cut + 1
    while hi > lo and arr[hi] & 0xC0 == 0x80:
        hi -= 1
    while hi == lo or (hi < stop and arr[hi] & 0xC0 == 0x80):
        hi += 1
    return hi


def let_go(text: bytes | mmap.mmap, start: int, upto: int) -> int:
    """Drop the mapped pages of `text[start:upto]` from this process (they stay in the page
    cache, so reading them again costs a fault, not a read): looking at a large file once must
    not hold all of it in resident memory. Returns the page boundary it got to."""
    end = upto - upto % mmap.PAGESIZE
    start -= start % mmap.PAGESIZE
    if isinstance(text, mmap.mmap) and end > start:
        text.madvise(mmap.MADV_DONTNEED, start, end - start)
    return max(start, end)


def bad_text(text: bytes | bytearray | mmap.mmap, start: int, stop: int | None = None) -> np.ndarray:
    """Sorted positions of the byte sequences that are not UTF-8 in `text[start:stop]`.

    Only chunks holding a byte above 0x7F are decoded at all.
    """
    import numpy as np

    if isinstance(text, bytes) and text.isascii():
        return np.zeros(0, dtype=np.int64)
    arr = np.frombuffer(text, dtype=np.uint8) if len(text) else np.zeros(0, np.uint8)
    stop = len(arr) if stop is None else stop
    found: list[int] = []
    lo = start
    while lo < stop:
        hi = span_end(text, arr, lo, stop)
        if not _ascii(arr[lo:hi]):
            _COLLECTED.positions = []
            bytes(text[lo:hi]).decode("utf-8", "weir-collect")
            found.extend(lo + p for p in _COLLECTED.positions)
        lo = hi
    return np.array(found, dtype=np.int64)


def line_of(text: bytes | mmap.mmap, position: int) -> int:
    return text.count(b"\n", 0, position) + 1 if isinstance(text, bytes) else \
        bytes(text[:position]).count(b"\n") + 1


def json_problem(text: bytes) -> tuple[int, str] | None:
    """The first line of NDJSON `text` that Python's json module cannot read as an object, with
    its message (None when every line reads)."""
    import json

    for number, line in enumerate(text.split(b"\n"), start=1):
        if not line.strip():
            continue
        try:
            value = json.loads(line)
        except ValueError as exc:
            return number, f"not JSON ({exc})"
        if not isinstance(value, dict):
            return number, f"a JSON {type(value).__name__}, not an object"
    return None


def repaired(text: bytes | mmap.mmap, found: Shape, fields: int, sep: str = ",") -> bytes:
    """`text` with every bad record replaced by an empty one (fields-1 separators): polars
    reads the same number of rows, in the same places, and can read every one."""
    filler = sep.encode() * (fields - 1) + b"\n"
    parts = []
    at = 0
    for start, end in zip(found.bad_start.tolist(), found.bad_end.tolist(), strict=True):
        parts.append(text[at:start])
        parts.append(filler)
        at = end + 1  # past the record's line feed
    parts.append(text[at:])
    out = b"".join(bytes(p) for p in parts)
    return out


def shape(text: bytes | mmap.mmap, begin: int, fields: int, sep: int = 44, quote: int = 34,
          path: str | None = None) -> Shape:
    """The records of CSV `text` from byte `begin` on, checked against `fields` fields each.

    `path`, the file `text` maps, lets plain stretches be read into one reused buffer
    instead of touching the mapping (cheaper than its page faults, and no resident pages).
    """
    if isinstance(text, bytes) and len(text) <= SMALL and fields > 1:
        rows = _plain_rows(text[begin:], fields, sep, quote)
        if rows is not None:
            empty, codes = empty_arrays()
            return Shape(rows, empty, empty, empty, empty, codes, empty, False)
    return Scan(text, begin, fields, sep, quote, path).run()


@lru_cache(maxsize=1)
def empty_arrays() -> tuple[np.ndarray, np.ndarray]:
    """Shared empty arrays (read-only) for files without a bad row."""
    import numpy as np

    out = np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.uint8)
    for a in out:
        a.flags.writeable = False
    return out


def _plain_rows(body: bytes, fields: int, sep: int, quote: int) -> int | None:
    """How many records a small, plain body holds when every one is plainly right: ASCII, no
    quotes, carriage returns or NUL bytes, each line with its separators (so none blank).
    None when any of that does not hold: `Scan` then looks properly. Checking each file
    with numpy costs more than reading it when there are thousands of tiny files."""
    if not body.isascii() or bytes([quote]) in body or b"\r" in body or b"\x00" in body:
        return None
    lines = body.split(b"\n")
    if lines[-1] == b"":
        lines.pop()
    separator = bytes([sep])
    if all(line.count(separator) == fields - 1 for line in lines):
        return len(lines)
    return None


class Scan:
    """One pass over the records, a chunk of bytes at a time.

    Per chunk, the separators, line feeds, quotes and carriage returns are
    found with numpy; quotes toggle "inside a quoted field" (their running
    parity), and every quote is checked to open a field or to close one (or to
    be doubled inside one), so that the parity is the RFC 4180 reading. Line
    feeds outside quotes end records; separators outside quotes count fields.
    A quote that breaks the rules makes its record bad up to the end of that
    physical line, and reading resumes after it (as a reader that takes such a
    quote for a plain character would); a quote never closed makes the rest of
    the text one bad record (its field never ends).
    """

    def __init__(self, text: bytes | mmap.mmap, begin: int, fields: int, sep: int, quote: int,
                 path: str | None = None):
        import numpy as np

        self.np = np
        self.fd = os.open(path, os.O_RDONLY) if path is not None and hasattr(os, "preadv") else None
        self.buf = bytearray(CHUNK if self.fd is not None else 0)
        self.buf_arr = np.frombuffer(self.buf, dtype=np.uint8)
        self.text = text
        self.arr = np.frombuffer(text, dtype=np.uint8) if len(text) else np.zeros(0, np.uint8)
        self.size = len(self.arr)
        self.fields, self.sep, self.quote = fields, sep, quote
        self.quote_byte = bytes([quote])
        # bytes that make a record bad wherever they are (NUL, not UTF-8), found chunk by chunk
        self.events, self.event_codes = np.zeros(0, np.int64), np.zeros(0, np.uint8)
        self.checked = begin  # events are known before this byte
        self.copy = False
        self.row, self.start, self.seps = 0, begin, 0
        self.inq, self.opened, self.closed = False, -1, -2
        self.blank: list[np.ndarray] = []
        self.bad: list[tuple[np.ndarray, ...]] = []
        # masks reused chunk after chunk: allocating them anew costs a page fault per page
        self.masks = np.zeros((3, CHUNK + 64), dtype=bool)
        self.released = begin  # mapped pages before this are let go (`let_go`)

    def run(self) -> Shape:
        try:
            return self._run()
        finally:
            if self.fd is not None:
                os.close(self.fd)

    def _run(self) -> Shape:
        np = self.np
        lo = self.start
        while True:
            while lo < self.size:
                lo = self._chunk(lo, min(lo + CHUNK, self.size))
            if not self.inq:
                break
            # a quote never closed: its field, and so its record, runs to the end of the text
            lo = self._bad_to_line_end(self.size, QUOTE_OPEN)
        if self.start < self.size:
            self._find_events(self.size)
            self._records(np.array([self.size]), np.array([self.seps]))
        bad = [np.concatenate(parts) if parts else np.zeros(0, np.int64) for parts in zip(*self.bad, strict=True)] \
            if self.bad else [np.zeros(0, np.int64)] * 5
        rows, starts, ends, codes, counts = bad
        blank = np.concatenate(self.blank) if self.blank else np.zeros(0, np.int64)
        codes = codes.astype(np.uint8)
        copy = self.copy or bool((codes <= QUOTE_OPEN).any())
        return Shape(self.row, np.union1d(blank, rows).astype(np.int64), rows.astype(np.int64),
                     starts.astype(np.int64), ends.astype(np.int64), codes, counts.astype(np.int64), copy)

    def _release(self, upto: int) -> None:
        if upto > self.released:
            self.released = let_go(self.text, self.released, upto)

    def _bad_to_line_end(self, at: int, code: int) -> int:
        """Make the current record bad from its start to the line feed after byte `at`; return where
        the next record starts."""
        np = self.np
        end = self.text.find(b"\n", at) if at < self.size else -1
        end = self.size if end < 0 else end
        self.bad.append((np.array([self.row]), np.array([self.start]), np.array([end]), np.array([code]),
                         np.array([self.seps + 1])))
        self.row += 1
        self.start, self.seps = end + 1, 0
        self.inq, self.opened, self.closed = False, -1, -2
        return end + 1

    def _find_events(self, upto: int, base: int = -1) -> None:
        """Find the NUL bytes and the sequences that are not UTF-8 before `upto` (a line feed's
        next byte, or the end: no multi-byte sequence holds a line feed), in the buffer when it
        holds them (it starts at `base`), else in the text."""
        np = self.np
        lo = self.checked
        if upto <= lo:
            return
        text: bytes | bytearray | mmap.mmap
        if 0 <= base <= lo:
            text, arr, shift = self.buf, self.buf_arr, base
        else:
            text, arr, shift = self.text, self.arr, 0
        found, codes = [], []
        if text.find(b"\x00", lo - shift, upto - shift) >= 0:
            nul = np.flatnonzero(arr[lo - shift:upto - shift] == NUL) + lo
            found.append(nul)
            codes.append(np.full(len(nul), HAS_NUL, np.uint8))
        if not _ascii(arr[lo - shift:upto - shift]):
            bad = bad_text(text, lo - shift, upto - shift) + shift
            if len(bad):
                self.copy = True
                found.append(bad)
                codes.append(np.full(len(bad), NOT_TEXT, np.uint8))
        if found:
            self._add(np.concatenate(found), np.concatenate(codes))
        self.checked = upto

    def _plain_chunk(self, lo: int, hi: int, a: np.ndarray, base: int) -> int:
        """`_chunk` for text without quotes or carriage returns (`a`, the bytes from `lo` to `hi`):
        every line feed ends a record. The next chunk starts after the last line feed.

        Separators are counted per record without listing them: their mask is packed
        into 64-bit words, whose running popcount gives the separators before any line feed.
        """
        np = self.np
        padded = -(-len(a) // 64) * 64
        seps_mask, lf_mask = self.masks[0, :padded], self.masks[1, :len(a)]
        np.equal(a, self.sep, out=seps_mask[:len(a)])
        seps_mask[len(a):] = False
        lf = np.flatnonzero(np.equal(a, LF, out=lf_mask))
        if not len(lf):
            self.seps += int(np.count_nonzero(seps_mask))
            return hi
        self._find_events(lo + int(lf[-1]) + 1, base)
        words = np.packbits(seps_mask, bitorder="little").view(np.uint64)
        before = np.cumsum(np.bitwise_count(words), dtype=np.int64)  # separators up to each word's end
        w = lf >> 6
        below = np.bitwise_count(words[w] & ((np.uint64(1) << (lf & 63).astype(np.uint64)) - np.uint64(1)))
        upto = below + np.where(w > 0, before[w - 1], 0)  # separators before each line feed
        seps = np.diff(upto, prepend=0)
        seps[0] += self.seps
        self.seps = 0  # the bytes after the last line feed are read again with the next chunk
        ends = lf + lo
        if self.fields > 1 and (seps == self.fields - 1).all() and not self._events_in(self.start, int(ends[-1])):
            self.row += len(ends)
            self.start = int(ends[-1]) + 1
        else:
            self._records(ends, seps)
        return int(ends[-1]) + 1

    def _chunk(self, lo: int, hi: int) -> int:
        np = self.np
        if self.fd is not None:
            hi = lo + os.preadv(self.fd, [memoryview(self.buf)[:hi - lo]], lo)
            text, base = self.buf, lo
            has_quote = self.inq or text.find(self.quote_byte, 0, hi - lo) >= 0
            has_cr = text.find(b"\r", 0, hi - lo) >= 0
            if not has_quote and not has_cr:
                return self._plain_chunk(lo, hi, self.buf_arr[:hi - lo], base)
        else:
            has_quote = self.inq or self.text.find(self.quote_byte, lo, hi) >= 0
            has_cr = self.text.find(b"\r", lo, hi) >= 0
            if not has_quote and not has_cr:
                return self._plain_chunk(lo, hi, self.arr[lo:hi], -1)
        self._release(lo - 2 * CHUNK)
        last_lf = self.text.rfind(b"\n", lo, hi)
        if last_lf >= 0:
            self._find_events(last_lf + 1)
        a = self.arr[lo:hi]
        mask, other = self.masks[0, :len(a)], self.masks[1, :len(a)]
        np.equal(a, self.sep, out=mask)
        mask |= np.equal(a, LF, out=other)
        if has_quote:
            mask |= np.equal(a, self.quote, out=other)
        if has_cr:
            mask |= np.equal(a, CR, out=other)
        at = np.flatnonzero(mask)
        kinds = a[at]
        at += lo
        if has_quote:
            quoted = kinds == self.quote
            if self.inq or quoted.any():
                inside = (np.cumsum(quoted) - quoted + self.inq) & 1  # 1: inside a quoted field
                qi = np.flatnonzero(quoted)
                wrong = self._wrong_quotes(at, inside, qi)
                if wrong is not None:
                    j, code = wrong
                    q = int(at[qi[j]])
                    if q > lo:
                        self._chunk(lo, q)  # the rows before the quote, with the state at it
                    return self._bad_to_line_end(q, code)
                if len(qi):
                    last = int(qi[-1])
                    after = int(inside[last]) ^ 1  # inside a quoted field after the last quote
                    if after:
                        self.opened = int(at[last])
                    else:
                        self.closed = int(at[last])
                    self.inq = bool(after)
                structural = ~quoted & (inside == 0)
                at, kinds = at[structural], kinds[structural]
        if has_cr:
            cr = kinds == CR
            if cr.any():
                following = self.arr[np.minimum(at[cr] + 1, self.size - 1)]
                bare = at[cr][(following != LF) & (at[cr] + 1 < self.size)]
                if len(bare):
                    self._add(bare, np.full(len(bare), BARE_CR, np.uint8))
                at, kinds = at[~cr], kinds[~cr]
        lf = np.flatnonzero(kinds == LF)
        if not len(lf):
            self.seps += len(kinds)
            return hi
        seps = np.diff(lf, prepend=-1) - 1
        seps[0] += self.seps
        self.seps = len(kinds) - int(lf[-1]) - 1
        ends = at[lf]
        if (self.fields > 1 and (seps == self.fields - 1).all() and not self._events_in(self.start, int(ends[-1]))
                and not has_cr):
            # the common case: every record has its fields (so none is blank) and nothing else is wrong
            self.row += len(ends)
            self.start = int(ends[-1]) + 1
            return hi
        self._records(ends, seps)
        return hi

    def _events_in(self, lo: int, hi: int) -> bool:
        if not len(self.events):
            return False
        first = int(self.np.searchsorted(self.events, lo, side="left"))
        return first < len(self.events) and int(self.events[first]) < hi

    def _wrong_quotes(self, at: np.ndarray, inside: np.ndarray, qi: np.ndarray) -> tuple[int, int] | None:
        """The first quote (index into `qi`) that neither opens a field, closes one nor is doubled
        inside one, with its reason; None when every quote is right."""
        np = self.np
        if not len(qi):
            return None
        gq = at[qi]
        opening = inside[qi] == 0
        before = self.arr[np.maximum(gq - 1, 0)]
        # a quote right after a closing one is the second of a doubled quote
        prev_closing = np.zeros(len(qi), dtype=bool)
        prev_closing[1:] = (~opening[:-1]) & (gq[:-1] == gq[1:] - 1)
        prev_closing[0] = self.closed == int(gq[0]) - 1
        opens_ok = (before == self.sep) | (before == LF) | prev_closing | (gq == self.start)
        last = gq + 1 >= self.size
        after = self.arr[np.minimum(gq + 1, self.size - 1)]
        closes_ok = last | (after == self.sep) | (after == LF) | (after == CR) | (after == self.quote)
        bad = np.flatnonzero(np.where(opening, ~opens_ok, ~closes_ok))
        if not len(bad):
            return None
        j = int(bad[0])
        return j, QUOTE_INSIDE if opening[j] else QUOTE_AFTER

    def _add(self, positions: np.ndarray, codes: np.ndarray) -> None:
        np = self.np
        pos = np.concatenate([self.events, positions])
        codes = np.concatenate([self.event_codes, codes])
        order = np.argsort(pos, kind="stable")
        self.events, self.event_codes = pos[order], codes[order]

    def _records(self, ends: np.ndarray, seps: np.ndarray) -> None:
        """Close records ending (before their line feed) at `ends`, with `seps` separators each."""
        np = self.np
        starts = np.empty_like(ends)
        starts[0] = self.start
        starts[1:] = ends[:-1] + 1
        rows = np.arange(self.row, self.row + len(ends), dtype=np.int64)
        length = ends - starts
        blank = (length == 0) | ((length == 1) & (self.arr[np.minimum(starts, self.size - 1)] == CR))
        code = np.where(~blank & (seps + 1 != self.fields), FIELDS, NOT_BAD).astype(np.uint8)
        if len(self.events):
            lo, hi = np.searchsorted(self.events, [int(starts[0]), int(ends[-1])], side="left")
            if hi > lo:
                where = np.searchsorted(ends, self.events[lo:hi], side="left")
                np.minimum.at(code, where, self.event_codes[lo:hi])
        bad = code != NOT_BAD
        if blank.any():
            self.blank.append(rows[blank])
        if bad.any():
            self.bad.append((rows[bad], starts[bad], ends[bad], code[bad], seps[bad] + 1))
        self.row += len(ends)
        self.start = int(ends[-1]) + 1
