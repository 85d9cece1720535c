"""Steps: polars SQL over the inputs, or a Python function. Lazy end to end.

A SQL step sees every input by name, every earlier step that has a `name:`,
and `bounds(window_start, window_end)`, one row of UTC datetimes. A python
step `package.module:function` (imported from the workspace) is called with
the inputs and earlier named steps as keyword arguments (LazyFrames; only
those its signature accepts, unless it takes **kwargs) plus `window`, and
returns a LazyFrame or DataFrame. The last step's result is the output.
"""

from __future__ import annotations

import importlib
import importlib.util
import inspect
import sys
from pathlib import Path
from typing import TYPE_CHECKING, Any

from runner.core.sqlcheck import SqlRefused, bounds_frame, query_shape
from runner.errors import WeirError
from runner.model.spec import JobSpec, PythonStep, SqlStep
from runner.model.timeutil import to_us

if TYPE_CHECKING:
    import polars as pl

    from runner.core.windows import Window


class StepError(WeirError):
    """A step could not be built (bad SQL, python step not importable, wrong return type)."""


def module_file(root: Path, module: str) -> Path:
    _on_path(root)
    try:
        spec = importlib.util.find_spec(module)
    except (ImportError, ValueError) as exc:
        raise StepError(f"python step module {module!r} cannot be found: {exc}") from None
    if spec is None or spec.origin is None or not spec.has_location:
        raise StepError(f"python step module {module!r} cannot be found in the workspace or the environment")
    return Path(spec.origin)


def _on_path(root: Path) -> None:
    """Python step modules are found in the workspace root and its jobs/ folder, before anywhere else."""
    for folder in (root / "jobs", root):
        text = str(folder)
        if text in sys.path:
            sys.path.remove(text)
        sys.path.insert(0, text)


def code_pieces(spec: JobSpec, root: Path) -> list[tuple[str, str]]:
    """(label, text) for each step: the SQL, or the python module's source."""
    pieces = []
    for i, step in enumerate(spec.steps):
        label = f"{i + 1}" + (f" ({step.name})" if step.name else "")
        if isinstance(step, SqlStep):
            pieces.append((f"{label} sql", step.sql))
        else:
            module = step.python.split(":")[0]
            path = module_file(root, module)
            try:
                text = path.read_bytes().decode("utf-8", errors="replace")
            except OSError as exc:
                raise StepError(f"cannot read python step module {path}: {exc}") from None
            pieces.append((f"{label} python {step.python}", text))
    return pieces


_loaded: dict[str, tuple[float, int]] = {}


def load_callable(root: Path, ref: str) -> Any:
    """Import `package.module:function` from the workspace (reloaded when its file changed)."""
    module_name, func_name = ref.split(":")
    path = module_file(root, module_name)
    stamp = (path.stat().st_mtime, path.stat().st_size)
    loaded = sys.modules.get(module_name)
    if loaded is not None and Path(getattr(loaded, "__file__", "") or "").resolve() != path.resolve():
        del sys.modules[module_name]  # a module of that name from another workspace
        loaded = None
    try:
        if loaded is not None and _loaded.get(module_name) != stamp:
            module = importlib.reload(loaded)
        else:
            module = importlib.import_module(module_name)
    except Exception as exc:
        raise StepError(f"python step {ref}: importing {module_name} failed: {type(exc).__name__}: {exc}") from exc
    _loaded[module_name] = stamp
    func = getattr(module, func_name, None)
    if not callable(func):
        raise StepError(f"python step {ref}: {module_name} has no function {func_name!r}")
    return func


def build(spec: JobSpec, inputs: dict[str, pl.LazyFrame], window: Window, root: Path) -> pl.LazyFrame:
    """The lazy result of all steps for one window (nothing is computed yet)."""
    import polars as pl

    frames: dict[str, pl.LazyFrame] = dict(inputs)
    result: pl.LazyFrame | None = None
    bounds = None
    for i, step in enumerate(spec.steps):
        where = f"step {i + 1}" + (f" ({step.name})" if step.name else "")
        if isinstance(step, SqlStep):
            try:  # the guard again: the job file may have changed since `weir check`
                shape = query_shape(step.sql)
            except SqlRefused as exc:
                raise StepError(f"{where}: {exc}") from None
            # Only the tables the step reads: registering every earlier step for each step is quadratic.
            tables = {name: frame for name, frame in frames.items() if name.lower() in shape.mentions}
            if "bounds" in shape.mentions:  # built only for steps that read it
                bounds = bounds if bounds is not None else bounds_frame(to_us(window.start), to_us(window.end))
                tables["bounds"] = bounds
            ctx = pl.SQLContext(frames=tables, eager=False)
            try:
                result = ctx.execute(step.sql)
            except pl.exceptions.PolarsError as exc:
                raise StepError(f"{where}: {type(exc).__name__}: {str(exc).splitlines()[0]}") from None
        else:
            assert isinstance(step, PythonStep)
            func = load_callable(root, step.python)
            kwargs = _arguments(func, frames, window)
            out = func(**kwargs)
            if isinstance(out, pl.DataFrame):
                out = out.lazy()
            if not isinstance(out, pl.LazyFrame):
                raise StepError(f"{where}: {step.python} returned {type(out).__name__}, "
                                "not a polars LazyFrame or DataFrame")
            result = out
        if step.name:
            frames[step.name] = result
    assert result is not None
    return result


def _arguments(func: Any, frames: dict[str, pl.LazyFrame], window: Window) -> dict[str, Any]:
    available: dict[str, Any] = {**frames, "window": window}
    try:
        params = inspect.signature(func).parameters
    except (TypeError, ValueError):
        return available
    if any(p.kind is inspect.Parameter.VAR_KEYWORD for p in params.values()):
        return available
    return {k: v for k, v in available.items() if k in params}
