"""The guard's metrics in the Prometheus text exposition format, on a loopback port."""

from __future__ import annotations

import math
from typing import Any

from drawledger.replay.guard._state import GuardState


class Metrics:
    """Gauges of one guard, served by ``prometheus_client`` on 127.0.0.1:``port``."""

    def __init__(self, port: int) -> None:
        from prometheus_client import CollectorRegistry, Gauge, start_http_server

        self.registry = CollectorRegistry()

        def gauge(name: str, text: str, labels: tuple[str, ...] = ()) -> Any:
            return Gauge(f"drawledger_guard_{name}", text, labels, registry=self.registry)

        self.seen = gauge("decisions_seen", "decisions taken in")
        self.verified = gauge("decisions_verified", "decisions verified by replay")
        self.mismatched = gauge("decisions_mismatched", "decisions replayed with a difference")
        self.unreplayable = gauge("decisions_unreplayable", "decisions that could not be replayed")
        self.alarms = gauge("alarms", "alarms standing")
        self.evidence = gauge("evidence", "e-value of a watched draw's test",
                              ("stream", "draw", "test"))  # fmt: skip
        self.lag_records = gauge("lag_records", "records in the ledger not yet taken in")
        self.lag_seconds = gauge("lag_seconds",
                                 "ledger time of the newest record minus that of the newest "
                                 "decision taken in")  # fmt: skip
        server = start_http_server(port, addr="127.0.0.1", registry=self.registry)
        self.server = server[0] if isinstance(server, tuple) else None
        self.port = port if self.server is None else int(self.server.server_address[1])

    def update(self, state: GuardState, lag_records: int, lag_seconds: float | None) -> None:
        self.seen.set(state.decisions)
        self.verified.set(state.verify["verified"])
        self.mismatched.set(state.verify["mismatched"])
        self.unreplayable.set(state.verify["unreplayable"])
        self.alarms.set(len(state.alarms))
        for w in state.watches.values():
            draw = w.draw or ""
            self.evidence.labels(w.stream, draw, w.test).set(math.exp(min(w.log_e, 700.0)))
            self.evidence.labels(w.stream, draw, "uniforms").set(
                math.exp(min(w.log_e_uniforms, 700.0)))  # fmt: skip
        self.lag_records.set(lag_records)
        self.lag_seconds.set(math.nan if lag_seconds is None else lag_seconds)

    def close(self) -> None:
        if self.server is not None:
            self.server.shutdown()
            self.server.server_close()
