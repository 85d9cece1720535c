"""Who holds a claim, and when a holder is provably gone.

A runner's identity (`owner_id`) is its host name and pid, a random token,
and a *place*: a digest of the machine id, the boot id and the pid namespace.
A pid means the same process only where the place matches, so a holder is
*provably gone* only when it is of this place and its process no longer
exists (or the pid now belongs to a process started at another time). Two
hosts with the same name, two containers, a reboot: never provably gone,
only expired. This is the one rule every command applies (`holder_gone`).
"""

from __future__ import annotations

import hashlib
import os
import secrets
import socket
from functools import lru_cache


def _read(path: str) -> str:
    try:
        with open(path, encoding="ascii", errors="replace") as fh:
            return fh.read().strip()
    except OSError:
        return ""


@lru_cache(maxsize=1)
def place() -> str:
    """A digest of this machine, boot and pid namespace; '' when they cannot be known (no /proc)."""
    boot = _read("/proc/sys/kernel/random/boot_id")
    try:
        namespace = str(os.stat("/proc/self/ns/pid").st_ino)
    except OSError:
        namespace = ""
    if not boot or not namespace:
        return ""
    machine = _read("/etc/machine-id") or _read("/var/lib/dbus/machine-id")
    return hashlib.sha256(f"{machine}|{boot}|{namespace}".encode()).hexdigest()[:16]


def _process(pid: int) -> tuple[str, str] | None:
    """(state, start time in clock ticks since boot) of a process, None when there is none."""
    text = _read(f"/proc/{pid}/stat")
    if not text or ")" not in text:
        return None
    fields = text.rsplit(")", 1)[1].split()
    # proc(5): after "pid (comm)" come state (field 3) ... starttime (field 22)
    return (fields[0], fields[19]) if len(fields) > 19 else None


def owner_id(pid: int | None = None) -> str:
    """This process as a lease owner: `host:pid:start:place:token`."""
    pid = os.getpid() if pid is None else pid
    proc = _process(pid)
    start = proc[1] if proc else ""
    return f"{socket.gethostname()}:{pid}:{start}:{place()}:{secrets.token_hex(4)}"


def holder_gone(owner: str) -> bool:
    """True when `owner` is provably gone: a process of this place that has ended.

    Owners written by other hosts, containers, boots or an older weir are
    never provably gone: only their lease's expiry frees them.
    """
    parts = owner.rsplit(":", 4)
    if len(parts) != 5:
        return False
    _host, pid, start, where, _token = parts
    if not where or where != place() or not pid.isdigit():
        return False
    proc = _process(int(pid))
    if proc is None:
        return True
    state, started = proc
    return state in ("Z", "X") or (bool(start) and started != start)  # a zombie, or the pid was reused


def process_ended(pid: int) -> bool:
    """True when no process of this pid namespace has `pid` any more (or only a zombie does)."""
    proc = _process(pid)
    return proc is None or proc[0] in ("Z", "X")
