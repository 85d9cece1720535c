"""A listing of one file input's candidate files, for many windows at once.

Globbing a path template once per window costs one directory walk per
window; planning a year of hourly windows would walk the landing folders
8,760 times. `FileIndex` walks once (the template with every placeholder
turned into `*`), groups files by folder, and answers each window's rendered
patterns from that listing. The manifest entries it returns are the ones
`sources.find_files` returns, so fingerprints computed either way agree.
"""

from __future__ import annotations

import fnmatch
import glob
import os
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from runner.core.paths import expand

_PLACEHOLDER = re.compile(r"\{[^{}]*\}")


@dataclass
class FileIndex:
    """Files (path -> (size, mtime_ns)) under one input template, grouped by folder."""

    root: Path
    template: str
    folders: dict[str, list[tuple[str, int, int]]] = field(default_factory=dict)
    listed: bool = False
    by_name: dict[str, dict[str, tuple[int, int]]] = field(default_factory=dict)
    real_folders: dict[str, str] = field(default_factory=dict)  # folder -> its real path (inputfiles.confine)

    @classmethod
    def build(cls, root: Path, template: str) -> FileIndex:
        index = cls(root=root, template=template)
        wild = _PLACEHOLDER.sub("*", template)
        full = wild if os.path.isabs(wild) else os.path.join(root, wild)
        for path in glob.glob(full, recursive=True):
            try:
                st = os.stat(path)
            except OSError:
                continue
            if not os.path.isfile(path):
                continue
            folder, name = os.path.split(path)
            index.folders.setdefault(folder, []).append((name, st.st_size, st.st_mtime_ns))
        index.listed = True
        return index

    def matches(self, pattern: str) -> list[tuple[str, int, int]]:
        """(full path, size, mtime_ns) of the files matching one rendered pattern."""
        full = pattern if os.path.isabs(pattern) else os.path.join(self.root, pattern)
        folder, name = os.path.split(full)
        if glob.has_magic(folder):
            out = []
            for path in glob.glob(full, recursive=True):
                if os.path.isfile(path):
                    st = os.stat(path)
                    out.append((path, st.st_size, st.st_mtime_ns))
            return out
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
            full = pattern if os.path.isabs(pattern) else os.path.join(root, pattern)
            hits = []
            paths = glob.glob(full, recursive=True) if glob.has_magic(full) else [full]
            for p in paths:
                if os.path.isfile(p):
                    st = os.stat(p)
                    hits.append((p, st.st_size, st.st_mtime_ns))
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
    """Fingerprint entries of an input's files (see `fingerprint.input_part`)."""
    from runner.io.readers import file_sha256

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


def window_files(root: Path, template: str, window: Any, index: FileIndex | None = None
                 ) -> tuple[list[str], list[tuple[str, int, int]]]:
    """The rendered patterns of a window and the files they match."""
    patterns = expand(template, window)
    return patterns, listing(root, patterns, index)
