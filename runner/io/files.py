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
import stat
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
