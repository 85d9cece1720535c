"""Input files made safe to hand to polars: where they really are, how they are encoded,
and which CSV rows are not records of the header's shape.

`prepare` looks at one file once (a small cache keeps the answer for the
process; large CSV files found clean are remembered across runs in
`state/input-checks.sqlite`, by version), before any polars plan reads it:

* its real path must lie inside the workspace or under a folder the input
  allows (`allow_outside:`), so a symlink in a landing folder cannot pull in
  a file from elsewhere;
* text is UTF-8 (a byte order mark is accepted) unless the input declares
  another `encoding:`, which is decoded by Python's codecs into UTF-8 in
  memory before polars reads it;
* a CSV file's rows are checked against RFC 4180: every record has as many
  fields as the header, quotes open a field or close one, no NUL bytes, no
  bare carriage returns, valid text. The check runs over the bytes with
  vectorized numpy operations (`runner.io.records`: one pass, in chunks read
  into one reused buffer); rows that fail it are
  *bad rows* with the file, the row number and the reason, and blank lines
  are skipped. Rows keep their numbers: polars reads the file (or, where
  polars could not, a copy with each bad record replaced by an empty one)
  and the caller drops the skipped row numbers.

Row numbers count records after the header from 0, blank lines included,
exactly as polars numbers the rows it reads (a blank line is a row of nulls
to polars).
"""

from __future__ import annotations

import codecs
import mmap
import os
import threading
from collections import OrderedDict
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

from runner.core.paths import INPUT_CHECKS
from runner.errors import WeirError
from runner.io import records
from runner.io.records import (
    Shape,
    bad_text,
    empty_arrays,
    let_go,
    line_of,
    repaired,
    shape,
    span_end,
)

if TYPE_CHECKING:
    pass


class InputError(WeirError):
    """An input cannot be read as declared (missing column, bad value, bad query)."""


class BadRows(InputError):
    """Bad rows under `on_bad_rows: fail`, or more bad rows than the limits allow."""


EAGER = 64 << 20  # NDJSON files up to this size are read at once, so that a syntax error can be located
REMEMBER = 1 << 20  # CSV files from this size on are remembered (state/input-checks.sqlite) once found clean
VERDICTS = os.path.basename(INPUT_CHECKS)
CHECK_VERSION = 1  # raised when the record check changes: remembered verdicts no longer count


# ---------------------------------------------------------------- where files are


def codec(encoding: str | None) -> str:
    """Python's canonical name of a declared encoding (`utf-8` when none is declared)."""
    name = codecs.lookup(encoding or "utf-8").name
    return "utf-8" if name == "utf-8-sig" else name


def outside_roots(root: Path, allowed: list[str] | None) -> tuple[str, ...]:
    """The real paths of the workspace and of the folders an input may also read."""
    return (os.path.realpath(root), *(os.path.realpath(a) for a in allowed or []))


def _within(real: str, roots: tuple[str, ...]) -> bool:
    return any(real == r or real.startswith(r if r.endswith(os.sep) else r + os.sep) for r in roots)


def confine(name: str, paths: list[str], roots: tuple[str, ...], label: Any,
            folders: dict[str, str] | None = None) -> list[str]:
    """The real paths of `paths`; InputError for the first whose real path, or its folder's,
    leaves `roots` (workspace first).

    Folders are resolved and checked once each (`folders` may carry their real paths from
    an earlier call); a file is resolved itself only when it is a symlink.
    """
    folders = {} if folders is None else folders
    reals = []
    for path in paths:
        folder, base = os.path.split(path)
        real_folder = folders.get(folder)
        if real_folder is None:
            real_folder = os.path.realpath(folder)
            if not _within(real_folder, roots):
                raise _outside(name, label(path), real_folder)
            folders[folder] = real_folder
        if os.path.islink(path):
            real = os.path.realpath(path)
            if not _within(real, roots):
                raise _outside(name, label(path), real)
        else:
            real = os.path.join(real_folder, base)
        reals.append(real)
    return reals


def _outside(name: str, label: str, where: str) -> InputError:
    return InputError(f"input {name}: {label} leads outside the workspace (to {where}); weir reads only files "
                      "inside the workspace or under a folder listed in the input's allow_outside:")


# ---------------------------------------------------------------- what a file holds


@dataclass
class FileRead:
    """One input file, ready for polars."""

    path: str  # as listed
    real: str  # its real path: what is read
    label: str  # workspace-relative, for messages
    fmt: str
    size: int
    encoding: str
    identity: str = ""  # real path, device, inode, size, modification and change times: a version of the file
    state: str = ""  # the workspace's state folder (remembered verdicts)
    header: tuple[str, ...] | None = None  # CSV column names
    header_text: bytes = b""  # the CSV header record as found (UTF-8, no byte order mark)
    shape: Shape | None = None  # CSV records
    body_start: int = 0  # where the records start in `text()`
    data: bytes | None = None  # UTF-8 text to read instead of the file (decoded, repaired), or None
    bad_text: list[bytes] = field(default_factory=list)  # each bad record's bytes (at most 64 KiB of each)
    kept: bytes | None = field(default=None, repr=False)  # the text of a small file, kept while in use

    def source(self) -> str | bytes:
        """What polars reads: the prepared bytes, or the file at its real path."""
        return self.data if self.data is not None else self.real

    def text(self) -> bytes | mmap.mmap:
        """The file's text (UTF-8) as `shape` saw it."""
        if self.data is not None:
            return self.data
        if self.kept is not None:
            return self.kept
        with open(self.real, "rb") as fh:
            if self.size <= records.SMALL:
                return fh.read()
            return mmap.mmap(fh.fileno(), 0, access=mmap.ACCESS_READ)

    def body(self) -> bytes:
        """The records after the header, ending with a line feed (for reading many small files as one)."""
        text = self.text()
        body = bytes(text[self.body_start:])
        return body if not body or body.endswith(b"\n") else body + b"\n"

    def bad_records(self) -> list[list[str]]:
        """The fields of each bad record as Python's csv module reads its text (for the
        quarantine file; undecodable bytes and NUL bytes shown as U+FFFD)."""
        import csv

        out = []
        for raw in self.bad_text:
            line = raw.decode("utf-8", "replace").replace("\x00", "\ufffd").rstrip("\r")
            try:
                out.append(next(csv.reader([line]), []))
            except csv.Error:
                out.append([line])
        return out


class _Cache:
    """The last prepared files of this process (what a file holds is found once per run)."""

    def __init__(self, entries: int = 4096, data_bytes: int = 64 << 20):
        self.entries, self.data_bytes = entries, data_bytes
        self.items: OrderedDict[tuple[Any, ...], FileRead] = OrderedDict()
        self.held = 0
        self.lock = threading.Lock()

    def get(self, key: tuple[Any, ...]) -> FileRead | None:
        with self.lock:
            hit = self.items.get(key)
            if hit is not None:
                self.items.move_to_end(key)
            return hit

    def put(self, key: tuple[Any, ...], read: FileRead) -> None:
        size = _held(read)
        if size > self.data_bytes:
            return
        with self.lock:
            self.items[key] = read
            self.held += size
            while len(self.items) > self.entries or self.held > self.data_bytes:
                _, old = self.items.popitem(last=False)
                self.held -= _held(old)


class _Remembered:
    """Large CSV files found clean, by version (`FileRead.identity`), kept across runs in
    `state/input-checks.sqlite`: checking a 2.8 GB file costs seconds, and backfills read the
    same landing files again and again. A file is a new version when its size, modification
    or change time (which no tool can set back), inode or device differ; files with bad rows
    are not remembered, and are checked on every read. Best effort: when the file cannot be
    used (a read-only state folder, a lock held too long) files are simply checked again."""

    def __init__(self) -> None:
        self.connections: dict[str, Any] = {}
        self.lock = threading.Lock()

    def _db(self, state: str) -> Any:
        import sqlite3

        with self.lock:
            if state not in self.connections:
                try:
                    conn = sqlite3.connect(os.path.join(state, VERDICTS), timeout=2, isolation_level=None,
                                           check_same_thread=False)
                    conn.execute("CREATE TABLE IF NOT EXISTS clean (file TEXT PRIMARY KEY, rows INTEGER NOT NULL, "
                                 "version INTEGER NOT NULL)")
                except sqlite3.Error:
                    conn = None
                self.connections[state] = conn
            return self.connections[state]

    def rows(self, state: str, identity: str) -> int | None:
        import sqlite3

        db = self._db(state)
        try:
            found = db.execute("SELECT rows FROM clean WHERE file = ? AND version = ?",
                               (identity, CHECK_VERSION)).fetchone() if db is not None else None
        except sqlite3.Error:
            return None
        return None if found is None else int(found[0])

    def remember(self, state: str, identity: str, rows: int) -> None:
        import sqlite3

        db = self._db(state)
        try:
            if db is not None:
                db.execute("INSERT OR REPLACE INTO clean VALUES (?, ?, ?)", (identity, rows, CHECK_VERSION))
        except sqlite3.Error:
            pass


_VERDICTS = _Remembered()


def _held(read: FileRead) -> int:
    return (len(read.data) if read.data is not None else 0) + sum(len(b) for b in read.bad_text)


_CACHE = _Cache()


def prepare(name: str, path: str, label: str, fmt: str, encoding: str | None,
            roots: tuple[str, ...], folders: dict[str, str] | None = None) -> FileRead:
    """Check one input file and say how polars should read it (see the module's docstring).

    Raises InputError, naming the file (and line where known), for what no row can be
    blamed for: a file outside the workspace, an unreadable or empty file, a header that
    cannot be read or repeats a name, text in a byte order mark of another encoding,
    NDJSON that is not text, a Parquet file without its footer. `folders` keeps real paths
    of folders between calls.
    """
    [real] = confine(name, [path], roots, lambda _: label, folders)  # again, as the file is opened
    try:
        st = os.stat(real)
    except OSError as exc:
        raise InputError(f"input {name}: cannot read {label}: {exc.strerror}") from None
    enc = codec(encoding)
    key = (real, st.st_size, st.st_mtime_ns, st.st_ino, fmt, enc)
    hit = _CACHE.get(key)
    if hit is not None:
        return FileRead(**{**hit.__dict__, "path": path, "label": label, "kept": None})
    identity = f"{real}\0{st.st_dev}\0{st.st_ino}\0{st.st_size}\0{st.st_mtime_ns}\0{st.st_ctime_ns}\0{enc}"
    read = FileRead(path, real, label, fmt, st.st_size, enc, identity, os.path.join(roots[0], "state"))
    try:
        if fmt == "parquet":
            _parquet(name, read)
        else:
            _text_file(name, read)
    except OSError as exc:
        raise InputError(f"input {name}: cannot read {label}: {exc.strerror or exc}") from None
    _CACHE.put(key, FileRead(**{**read.__dict__, "kept": None}))
    return read


def _parquet(name: str, read: FileRead) -> None:
    import polars as pl

    try:
        pl.read_parquet_schema(read.real)
    except Exception as exc:  # noqa: BLE001 - any reader error is the file's
        raise InputError(f"input {name}: cannot read {read.label} as Parquet: {str(exc).splitlines()[0]}"
                         ) from None


def _raw(read: FileRead) -> bytes | mmap.mmap:
    """The file's bytes: whole when small or compressed, mapped otherwise."""
    with open(read.real, "rb") as fh:
        if read.size <= records.SMALL:
            raw: bytes | mmap.mmap = fh.read()
        elif read.size == 0:
            raw = b""
        else:
            raw = mmap.mmap(fh.fileno(), 0, access=mmap.ACCESS_READ)
    if raw[:2] == b"\x1f\x8b":  # gzip, which polars would decompress itself
        import gzip

        raw = gzip.decompress(bytes(raw))
        read.data = raw
    return raw


def _text_file(name: str, read: FileRead) -> None:
    raw = _raw(read)
    where = f"input {name}: {read.label}"
    if read.encoding == "utf-8":
        if raw[:2] in (b"\xff\xfe", b"\xfe\xff"):
            raise InputError(f"{where}: starts with a UTF-16 byte order mark; declare encoding: utf-16 "
                             "on the input")
        text = raw
        start = 3 if raw[:3] == b"\xef\xbb\xbf" else 0
        if start and read.fmt == "ndjson":
            text = read.data = bytes(raw[start:])  # polars' NDJSON reader does not skip the mark
            start = 0
    else:
        # another encoding: decoded into UTF-8 in memory; bytes it cannot decode are kept as
        # they were, so the rows holding them are found below as not valid text
        text = read.data = bytes(raw).decode(read.encoding, "surrogateescape").encode("utf-8", "surrogateescape")
        start = 0
    if len(text) <= start:
        raise InputError(f"{where}: the file is empty (a CSV file needs at least its header line)"
                         if read.fmt == "csv" else f"{where}: the file is empty")
    if read.fmt == "csv":
        _csv(name, read, text, start)
    else:
        _ndjson(where, read, text, start)
    if read.size <= records.SMALL and read.data is None:
        read.kept = bytes(text)


def _ndjson(where: str, read: FileRead, text: bytes | mmap.mmap, start: int) -> None:
    import numpy as np

    arr = np.frombuffer(text, dtype=np.uint8)
    lo = released = start
    while lo < len(text):
        hi = span_end(text, arr, lo, len(text))
        nul = text.find(b"\x00", lo, hi)
        if nul >= 0:
            raise InputError(f"{where}, line {line_of(text, nul)}: NUL bytes (a damaged or zero-padded file?)")
        bad = bad_text(text, lo, hi)
        if len(bad):
            raise InputError(f"{where}, line {line_of(text, int(bad[0]))}: bytes that are not valid "
                             f"{read.encoding} (declare the file's encoding: on the input)")
        released = let_go(text, released, lo)
        lo = hi
    end = len(text)
    while end > start and text[end - 1:end] in (b"\n", b"\r", b" ", b"\t"):
        end -= 1
    if end > start and text[end - 1:end] != b"}":
        raise InputError(f"{where}, line {line_of(text, end - 1)}: the last line is cut off (it does not "
                         "end with the closing brace of an object)")


def _header(where: str, text: bytes | mmap.mmap, start: int, quote: int) -> int:
    """Where the header record ends (its line feed, or the end of the text)."""
    end = text.find(b"\n", start)
    while end >= 0 and bytes(text[start:end]).count(bytes([quote])) % 2:
        end = text.find(b"\n", end + 1)  # a quoted name holds a line feed
    if end < 0:
        if bytes(text[start:]).count(bytes([quote])) % 2:
            raise InputError(f"{where}, header: a quoted name that is never closed")
        return len(text)
    return end


def _csv(name: str, read: FileRead, text: bytes | mmap.mmap, start: int, sep: str = ",",
         quote: str = '"') -> None:
    import csv

    where = f"input {name}: {read.label}"
    end = _header(where, text, start, ord(quote))
    raw_header = bytes(text[start:end])
    if b"\x00" in raw_header:
        raise InputError(f"{where}, header: NUL bytes (a damaged or zero-padded file?)")
    try:
        line = raw_header.decode("utf-8").rstrip("\r")
    except UnicodeDecodeError:
        raise InputError(f"{where}, header: bytes that are not valid {read.encoding} (declare the file's "
                         "encoding: on the input)") from None
    try:
        names = next(csv.reader([line], strict=True, delimiter=sep, quotechar=quote), [])
    except csv.Error as exc:
        raise InputError(f"{where}, header: {exc}") from None
    if not line.strip():
        raise InputError(f"{where}: the first line is empty; a CSV file starts with its header line")
    seen: dict[str, int] = {}
    for i, column in enumerate(names, 1):
        if column in seen:
            raise InputError(f"{where}, header: column name {column!r} appears twice (columns {seen[column]} "
                             f"and {i}); rows cannot be read by name")
        seen[column] = i
    read.header = tuple(names)
    read.header_text = raw_header.rstrip(b"\r") + b"\n"
    read.body_start = min(end + 1, len(text))
    remember = read.size >= REMEMBER and read.data is None
    rows = _VERDICTS.rows(read.state, read.identity) if remember else None
    if rows is not None:  # this very version of the file was found clean before
        empty, codes = empty_arrays()
        read.shape = Shape(rows, empty, empty, empty, empty, codes, empty, False)
        return
    read.shape = shape(text, read.body_start, len(names), ord(sep), ord(quote),
                       read.real if isinstance(text, mmap.mmap) else None)
    if remember and not len(read.shape.skip):
        _VERDICTS.remember(read.state, read.identity, read.shape.rows)
    read.bad_text = [bytes(text[start:min(end, start + (64 << 10))]) for start, end in
                     zip(read.shape.bad_start.tolist(), read.shape.bad_end.tolist(), strict=True)]
    if read.shape.copy_needed:
        read.data = repaired(text, read.shape, len(names), sep)


# ---------------------------------------------------------------- CSV record shapes


