"""Progress bars: the command line draws them; the analysis and the dataset only call back."""

from __future__ import annotations

import sys
from collections.abc import Callable, Iterator
from contextlib import contextmanager


@contextmanager
def bar(label: str, show: bool | None = None, unit: str = "bytes") -> Iterator[Callable[[int, int | None], None]]:
    """A ``progress(done, total)`` callback drawing a bar on stderr (when it is a terminal, or ``show``)."""
    show = sys.stderr.isatty() if show is None else show
    if not show:
        yield lambda done, total: None
        return
    from rich.console import Console
    from rich.progress import (
        BarColumn,
        DownloadColumn,
        MofNCompleteColumn,
        Progress,
        TextColumn,
        TimeRemainingColumn,
    )
    amount = DownloadColumn() if unit == "bytes" else MofNCompleteColumn()
    with Progress(TextColumn(label), BarColumn(), amount, TimeRemainingColumn(), console=Console(stderr=True),
                  transient=True) as progress:
        task = progress.add_task(label, total=None)

        def update(done: int, total: int | None) -> None:
            progress.update(task, completed=done, total=total)

        yield update


def analyze_with_bar(source, options, sinks=(), show: bool | None = None):
    """``analyze`` with the bar over the bytes read."""
    from buswitness.analysis import analyze
    with bar("analysing", show) as progress:
        return analyze(source, options, sinks=sinks, progress=progress)
