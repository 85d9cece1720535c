"""Keeping leases alive: one renewer thread per owner, and a workspace-wide lock built on it.

`Leases` renews every lease of one owner (window claims and locks) from a
background thread of the process that supervises the workers, so a step
that never lets go of the interpreter, or a worker that hangs, cannot stop
the renewals; it also notices claims another runner has taken over. Who an
owner is and when a holder is gone: `runner.io.owners`.
"""

from __future__ import annotations

import contextlib
import threading
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from runner.io.ledger.store import Ledger


class Leases:
    """Renews every lease of `owner` in `ledger` every third of `lease` seconds, from one thread.

    `watch` the claims the owner's workers hold; after each renewal, `lost()`
    names those another runner has taken over (the supervisor stops them).
    """

    def __init__(self, ledger: Ledger, owner: str, lease: float):
        self.ledger, self.owner, self.lease = ledger, owner, lease
        self._watched: dict[tuple[str, str], int] = {}
        self._lost: set[tuple[str, str]] = set()
        self._lock = threading.Lock()
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self.failures = 0  # renewals in a row that could not reach the ledger

    def start(self) -> Leases:
        if self._thread is None:
            self._thread = threading.Thread(target=self._loop, name="weir-leases", daemon=True)
            self._thread.start()
        return self

    def stop(self) -> None:
        self._stop.set()
        if self._thread is not None and self._thread is not threading.current_thread():
            self._thread.join(timeout=self.lease)

    def watch(self, job: str, key: str, fence: int) -> None:
        with self._lock:
            self._watched[(job, key)] = fence
            self._lost.discard((job, key))

    def forget(self, job: str, key: str) -> None:
        with self._lock:
            self._watched.pop((job, key), None)
            self._lost.discard((job, key))

    def lost(self) -> set[tuple[str, str]]:
        with self._lock:
            return set(self._lost)

    def renew(self) -> None:
        """One round: extend every lease of the owner, then see which watched claims another runner took.

        A watched claim that is merely gone was released by its own run (which then reports
        its end); only one held by another owner or under another fence counts as lost.
        """
        held = self.ledger.renew_all(self.owner, self.lease)
        with self._lock:
            missing = {k: f for k, f in self._watched.items() if held.get(k) != f}
        if not missing:
            return
        holders = self.ledger.claim_holders(list(missing))
        with self._lock:
            for k, fence in missing.items():
                holder = holders.get(k)
                if holder is not None and holder != (self.owner, fence) and k in self._watched:
                    self._lost.add(k)

    def _loop(self) -> None:
        while not self._stop.wait(self.lease / 3 if not self.failures else min(1.0, self.lease / 6)):
            try:
                self.renew()
                self.failures = 0
            except Exception:  # noqa: BLE001 - the ledger is unreachable: try again soon; fencing keeps runs safe
                self.failures += 1


class HeldLock:
    """A workspace-wide lock held for a block, renewed by a `Leases` thread.

    `acquired` is False when another live owner holds it; the block then runs
    without it (the caller decides what to do). The lock's `leases` also renew
    the owner's window claims, so one thread serves a whole tick.
    """

    def __init__(self, ledger: Ledger, name: str, owner: str, ttl: float = 120.0):
        self.ledger, self.name, self.owner, self.ttl = ledger, name, owner, ttl
        self.acquired = False
        self.leases = Leases(ledger, owner, ttl)

    def __enter__(self) -> HeldLock:
        self.acquired = self.ledger.lock(self.name, self.owner, self.ttl)
        if self.acquired:
            self.leases.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.leases.stop()
        if self.acquired:
            with contextlib.suppress(Exception):  # an unreachable ledger: the lock expires by itself
                self.ledger.unlock(self.name, self.owner)

    def holder(self) -> str | None:
        return self.ledger.lock_holder(self.name)
