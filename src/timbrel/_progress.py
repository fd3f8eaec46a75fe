"""A progress display for long work, or nothing when it is turned off or not a terminal."""

from __future__ import annotations

import contextlib
from collections.abc import Iterator
from typing import Any


class _Silent:
    def add_task(self, *args: Any, **kwargs: Any) -> int:
        return 0

    def update(self, *args: Any, **kwargs: Any) -> None:
        pass

    def advance(self, *args: Any, **kwargs: Any) -> None:
        pass


@contextlib.contextmanager
def progress_bar(enabled: bool) -> Iterator[Any]:
    """A rich ``Progress`` (bar, counts, elapsed, remaining, a free text field), or a
    silent stand-in.

    Rich is imported only when the bar is shown, so library use stays light.
    """
    if not enabled:
        yield _Silent()
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

    console = Console(stderr=True)
    columns = [TextColumn("[bold]{task.description}"), BarColumn(), MofNCompleteColumn(),
               TimeElapsedColumn(), TextColumn("eta"), TimeRemainingColumn(),
               TextColumn("{task.fields[info]}")]
    with Progress(*columns, console=console) as bar:
        yield bar
