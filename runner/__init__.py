"""weir: a declarative batch job runner with idempotent re-runs.

The public surface is small: load a workspace, list windows, plan, run.
Heavy modules (polars, sqlalchemy, pydantic) are imported where they are
used, so that a CLI call that needs none of them starts quickly.
"""

__version__ = "0.1.0"
