"""Files on disk: the one walk over an input template's files, listings for many windows at once,
manifests and hashing, and the check that a path stays inside the workspace once links are followed.

Globbing a path template once per window costs one directory walk per
window; planning a year of hourly windows would walk the landing folders
8,760 times. `FileIndex` walks once (the template with every placeholder
turned into `*`), groups files by folder, and answers each window's rendered
patterns from that listing. The manifest entries it returns are the ones
`readers.find_files` returns, so fingerprints computed either way agree.
"""

from __future__ import annotations

import fnmatch
import glob
import hashlib
import os
import re
import secrets
import socket
import stat
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from runner.core.paths import PLACEHOLDER


def wildcard(root: Path | str, template: str) -> str:
    """The glob pattern of every file a path template can match: each placeholder as `*`, under `root`."""
    wild = PLACEHOLDER.sub("*", template)
    return wild if os.path.isabs(wild) else os.path.join(root, wild)


def stat_files(pattern: str) -> list[tuple[str, int, int]]:
    """(path, size, mtime_ns) of each regular file matching a glob pattern (`**` recursive; a
    pattern without wildcards is the one path), in no particular order. Files that vanish or
    cannot be read while walking are left out."""
    out = []
    for path in glob.glob(pattern, recursive=True) if glob.has_magic(pattern) else [pattern]:
        try:
            st = os.stat(path)
        except OSError:
            continue
        if stat.S_ISREG(st.st_mode):
            out.append((path, st.st_size, st.st_mtime_ns))
    return out


@dataclass
class FileIndex:
    """Files (path -> (size, mtime_ns)) under one input template, grouped by folder."""

    root: Path
    template: str
    folders: dict[str, list[tuple[str, int, int]]] = field(default_factory=dict)
    by_name: dict[str, dict[str, tuple[int, int]]] = field(default_factory=dict)
    real_folders: dict[str, str] = field(default_factory=dict)  # folder -> its real path (inputfiles.confine)

    @classmethod
    def build(cls, root: Path, template: str) -> FileIndex:
        index = cls(root=root, template=template)
        for path, size, mtime_ns in stat_files(wildcard(root, template)):
            folder, name = os.path.split(path)
            index.folders.setdefault(folder, []).append((name, size, mtime_ns))
        return index

    def matches(self, pattern: str) -> list[tuple[str, int, int]]:
        """(full path, size, mtime_ns) of the files matching one rendered pattern."""
        full = pattern if os.path.isabs(pattern) else os.path.join(self.root, pattern)
        folder, name = os.path.split(full)
        if glob.has_magic(folder):
            return stat_files(full)
        key = os.path.normpath(folder)
        entries = self.folders.get(key) or self.folders.get(folder) or []
        if not glob.has_magic(name):
            names = self.by_name.get(key)
            if names is None:
                names = self.by_name[key] = {n: (s, m) for n, s, m in entries}
            hit = names.get(name)
            return [(os.path.join(folder, name), *hit)] if hit else []
        return [(os.path.join(folder, n), s, m) for n, s, m in entries
                if fnmatch.fnmatchcase(n, name) and not (n.startswith(".") and not name.startswith("."))]


def listing(root: Path, patterns: list[str], index: FileIndex | None = None) -> list[tuple[str, int, int]]:
    """Distinct files matching any of `patterns`, sorted by path."""
    found: dict[str, tuple[str, int, int]] = {}
    for pattern in patterns:
        if index is not None:
            hits = index.matches(pattern)
        else:
            hits = stat_files(pattern if os.path.isabs(pattern) else os.path.join(root, pattern))
        for hit in hits:
            found[os.path.normpath(hit[0])] = (os.path.normpath(hit[0]), hit[1], hit[2])
    return [found[k] for k in sorted(found)]


def relative(root: Path, path: str) -> str:
    """Workspace-relative POSIX path when inside the workspace, else the absolute path.

    Paths found under the (already resolved) workspace root are cut by prefix;
    anything else is resolved first.
    """
    prefix = str(root) + os.sep
    if path.startswith(prefix) and ".." not in path:
        return path[len(prefix):].replace(os.sep, "/")
    try:
        return Path(path).resolve().relative_to(root.resolve()).as_posix()
    except ValueError:
        return str(Path(path).resolve())


def manifest(root: Path, name: str, files: list[tuple[str, int, int]], content: bool) -> list[dict[str, Any]]:
    """Fingerprint entries of an input's files (see `fingerprints.input_part`)."""
    out = []
    for path, size, mtime_ns in files:
        entry: dict[str, Any] = {"input": name, "path": relative(root, path)}
        if content:
            entry["sha256"] = file_sha256(path)
        else:
            entry["size"] = size
            entry["mtime_ns"] = mtime_ns
        out.append(entry)
    return out


def escapes(root: str | os.PathLike[str], relative: str) -> bool:
    """True when `relative`, resolved under `root` (symbolic links followed), would land outside it.

    Resolved afresh on every call (nothing remembered): a folder may be swapped
    for a link between two writes. Writers check again at open time
    (`outputs.open_folder`).
    """
    if os.path.isabs(relative):
        return True
    base = os.path.realpath(root)
    folder, name = os.path.split(os.path.normpath(os.path.join(base, relative)))
    target = os.path.join(os.path.realpath(folder), name)
    if os.path.islink(target):
        target = os.path.realpath(target)
    return os.path.commonpath([base, target]) != base


def file_sha256(path: str | Path) -> str:
    """The SHA-256 of a file's bytes, in hex (read in 1 MiB blocks)."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


# ---------------------------------------------------------------- temporary files and atomic writes

TMP_MARK = ".weir-tmp-"
# .NAME.weir-tmp-HOST-PID-RANDOM (HOST- absent in names written before it was added)
_TMP_NAME = re.compile(r"^\..+\.weir-tmp-(?:(?P<host>[A-Za-z0-9._-]+)-)?(?P<pid>\d+)-[0-9a-f]{8}$")
STALE_AFTER = 24 * 3600  # seconds: a temporary file untouched this long is no live write's


def _host() -> str:
    return re.sub(r"[^A-Za-z0-9.-]", "_", socket.gethostname())[:64] or "host"


def temporary_name(final_name: str) -> str:
    """The name of a new temporary file for `final_name`: it says which host and process write it."""
    return f".{final_name}{TMP_MARK}{_host()}-{os.getpid()}-{secrets.token_hex(4)}"


def stale_temporary(name: str, mtime: float, now: float) -> bool:
    """True for weir's own temporary file name that no live process is writing any more.

    Its process, of this host, has ended; or (another host's, or a reused
    process id) it was last written over `STALE_AFTER` seconds ago.
    """
    from runner.io.owners import process_ended

    found = _TMP_NAME.match(name)
    if found is None:
        return False
    if now - mtime > STALE_AFTER:
        return True
    host = found["host"]
    return (host is None or host == _host()) and process_ended(int(found["pid"]))


def clean_leftovers(folder: int | str | Path, prefix: str = "", now: float | None = None) -> int:
    """Remove stale temporary files (whose names start with `prefix`) from a folder (a path or a
    descriptor); return how many."""
    now = time.time() if now is None else now
    try:
        entries = list(os.scandir(folder))
    except (FileNotFoundError, NotADirectoryError):
        return 0
    dir_fd = folder if isinstance(folder, int) else None
    count = 0
    for entry in entries:
        if TMP_MARK not in entry.name or not entry.name.startswith(prefix):
            continue
        try:
            if entry.is_file(follow_symlinks=False) and stale_temporary(
                    entry.name, entry.stat(follow_symlinks=False).st_mtime, now):
                os.unlink(entry.name if dir_fd is not None else entry.path, dir_fd=dir_fd)
                count += 1
        except FileNotFoundError:
            pass
    return count


def write_atomic(path: Path | str, data: bytes | str, mode: int = 0o644, mtime: float | None = None) -> Path:
    """Replace the file at `path` with `data` in one step: a temporary file beside it (a weir
    temporary name, swept like any other when a crash leaves it), written, flushed to disk, then
    renamed over `path`. A reader sees the old file or the new one, never half of one. The folder
    is created when missing; `mtime` (seconds) sets the new file's modification time.
    """
    target = Path(path)
    target.parent.mkdir(parents=True, exist_ok=True)
    tmp = target.with_name(temporary_name(target.name))
    try:
        with open(tmp, "wb") as fh:
            fh.write(data.encode("utf-8") if isinstance(data, str) else data)
            fh.flush()
            os.fsync(fh.fileno())
        os.chmod(tmp, mode)
        if mtime is not None:
            os.utime(tmp, (mtime, mtime))
        os.replace(tmp, target)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    return target
