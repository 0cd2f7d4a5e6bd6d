"""Engines map a function over pieces and give the results in order: local processes or Dask."""

from drawledger.replay.engines._dask import (
    NO_PROFILER,
    advance_bar,
    cluster,
    gather_pieces,
    one_result,
    run_pieces,
    submit_first,
)
from drawledger.replay.engines._local import executor, fork_context, pool_result, progress_bar

__all__ = [
    "NO_PROFILER",
    "advance_bar",
    "cluster",
    "executor",
    "fork_context",
    "gather_pieces",
    "one_result",
    "pool_result",
    "progress_bar",
    "run_pieces",
    "submit_first",
]
