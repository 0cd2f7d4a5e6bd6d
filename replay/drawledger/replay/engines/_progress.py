"""A progress bar on stderr counting decisions, shown only on a terminal."""

from __future__ import annotations

import sys
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from typing import Any

from drawledger.replay.sources import Task


def _nothing(index: int) -> None:
    pass


@contextmanager
def progress_bar(
    enabled: bool, items: Sequence[Any], label: str | None
) -> Iterator[Callable[[int], None]]:
    """A function advancing the bar past the item at an index: a task by its decisions,
    anything else by one (nothing happens without a bar)."""
    if not enabled or label is None or not sys.stderr.isatty():
        yield _nothing
        return
    from rich.console import Console
    from rich.progress import Progress

    sizes = [item.rows if isinstance(item, Task) else 1 for item in items]
    bar = Progress(console=Console(stderr=True), transient=True)
    task = bar.add_task(label, total=sum(sizes))
    bar.start()
    try:
        yield lambda index: bar.advance(task, sizes[index])
    finally:
        bar.stop()
