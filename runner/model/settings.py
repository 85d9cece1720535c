"""Workspace settings: `jobs/_settings.yaml`, settings that hold for every job of a workspace."""

from __future__ import annotations

from datetime import timedelta

from pydantic import Field, field_validator

from runner.model.fields import Duration, Model

SETTINGS_FILE = "_settings.yaml"  # in jobs/: settings for every job of a workspace


DEFAULT_TIME_ALLOWED = timedelta(hours=1)


DEFAULT_LEASE = timedelta(minutes=2)


MIN_LEASE = timedelta(seconds=2)


class WorkspaceSettings(Model):
    """`jobs/_settings.yaml`: settings that hold for every job of the workspace."""

    time_allowed: Duration = Field(
        default=DEFAULT_TIME_ALLOWED,
        description="how long one attempt at a window may run before weir stops it and records it failed; "
                    "a job's own time_allowed: wins")
    lease: Duration = Field(
        default=DEFAULT_LEASE,
        description="how long a runner's claim on a window (and the tick lock) lasts without renewal; "
                    "renewed every third of it while the runner lives")

    @field_validator("time_allowed")
    @classmethod
    def _positive_time(cls, value: timedelta) -> timedelta:
        if value <= timedelta(0):
            raise ValueError("time_allowed must be positive")
        return value

    @field_validator("lease")
    @classmethod
    def _long_enough(cls, value: timedelta) -> timedelta:
        if value < MIN_LEASE:
            raise ValueError(f"lease must be at least {int(MIN_LEASE.total_seconds())}s")
        return value
