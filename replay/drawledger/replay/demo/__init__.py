"""The invented grocery-delivery scenario, end to end."""

from drawledger.replay.demo._run import DemoResult, run_demo

__all__ = [
    "DemoResult",
    "run_demo",
]
