"""What running windows needs, handed to every worker: the workspace, the ledger, who holds the claims."""

from __future__ import annotations

from dataclasses import dataclass, field

from runner.core.workspace import Workspace
from runner.io.ledger.store import Ledger
from runner.io.owners import owner_id


@dataclass
class RunContext:
    """What running windows needs: the workspace, the ledger and who holds the claims.

    `owner` is the supervising process's identity: workers take claims in its
    name, and it renews them (`leases.Leases`).
    """

    ws: Workspace
    ledger: Ledger
    owner: str = field(default_factory=owner_id)

    @property
    def lease(self) -> float:
        return self.ws.settings.lease.total_seconds()
