"""Progress bars on stderr (rich), so stdout stays clean for ``--json``."""

from __future__ import annotations

import sys
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from typing import Any, TextIO


@contextmanager
def progress_bar(label: str, *, enabled: bool = True,
                 file: TextIO | None = None) -> Iterator[Callable[..., None]]:
    """Yield ``update(done, total, **fields)``; fields show as ``key=value`` after the bar.

    Disabled (a no-op) when ``enabled`` is false or stderr is not a terminal and
    nothing asked for it, so logs and tests stay quiet.
    """
    if not enabled:
        yield lambda *a, **k: None
        return
    from rich.console import Console
    from rich.progress import (
        BarColumn,
        MofNCompleteColumn,
        Progress,
        TextColumn,
        TimeElapsedColumn,
        TimeRemainingColumn,
    )

    console = Console(file=file or sys.stderr)
    columns = (  # "3/16 0:00:04 elapsed, 0:00:12 left": each time before its word
        TextColumn("[bold]{task.description}"),
        BarColumn(),
        MofNCompleteColumn(),
        TimeElapsedColumn(),
        TextColumn("elapsed,"),
        TimeRemainingColumn(),
        TextColumn("left"),
        TextColumn("{task.fields[info]}"),
    )
    with Progress(*columns, console=console, transient=False) as prog:
        task = prog.add_task(label, total=None, info="")

        def update(done: int, total: int | None = None, **fields: Any) -> None:
            info = "  ".join(_fmt(k, v) for k, v in fields.items() if v is not None)
            prog.update(task, completed=done, total=total, info=info)

        yield update


def _fmt(key: str, value: Any) -> str:
    if isinstance(value, float):
        return f"{key} {value:.4g}"
    return f"{key} {value}"
