"""The local engine: worker processes (forked where possible) and a progress bar."""

from __future__ import annotations

import multiprocessing
import sys
from concurrent.futures import Executor, Future, ProcessPoolExecutor
from concurrent.futures.process import BrokenProcessPool
from typing import Any

from drawledger.exceptions import (
    ReplayError,
)


def fork_context() -> Any:
    """Processes forked where the platform allows (they inherit imported decision code)."""
    methods = multiprocessing.get_all_start_methods()
    return multiprocessing.get_context("fork" if "fork" in methods else None)


def executor(jobs: int) -> Executor | None:
    if jobs == 1:
        return None
    return ProcessPoolExecutor(max_workers=jobs, mp_context=fork_context())


def pool_result(fut: Future[Any]) -> Any:
    try:
        return fut.result()
    except BrokenProcessPool as exc:
        raise ReplayError(f"a replay process died (out of memory?): {exc}") from None


def progress_bar(progress: bool, total: int) -> tuple[Any, Any] | None:
    if not progress or not sys.stderr.isatty():
        return None
    from rich.console import Console
    from rich.progress import Progress

    bar = Progress(console=Console(stderr=True), transient=True)
    task = bar.add_task("replaying", total=total)
    bar.start()
    return bar, task
