"""Engines map a function over tasks and give the results in order: local processes or Dask."""

from drawledger.replay.engines._dask import NO_PROFILER, DaskEngine, cluster
from drawledger.replay.engines._engine import ENGINES, Engine, Handle, open_engine
from drawledger.replay.engines._local import LocalEngine

__all__ = [
    "ENGINES",
    "NO_PROFILER",
    "DaskEngine",
    "Engine",
    "Handle",
    "LocalEngine",
    "cluster",
    "open_engine",
]
