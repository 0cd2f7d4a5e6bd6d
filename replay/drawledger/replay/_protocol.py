"""What every report offers: JSON, rich and plain-text rendering, and an HTML table."""

from __future__ import annotations

from typing import TYPE_CHECKING, Any, Protocol, runtime_checkable

if TYPE_CHECKING:
    import pandas as pd
    from rich.console import Console, ConsoleOptions, RenderResult

    from drawledger.replay.audit import AuditReport
    from drawledger.replay.estimate import EstimateReport, SweepReport
    from drawledger.replay.integrity import IntegrityReport
    from drawledger.replay.verify import VerifyReport


@runtime_checkable
class Report(Protocol):
    """A result of verify, audit, estimate, sweep or check_integrity.

    ``to_dict()`` is its JSON (what ``--json`` writes), ``to_frame()`` its rows as a pandas
    DataFrame, ``render()`` its plain text, rich prints it as tables and a notebook shows
    ``_repr_html_()``, a small HTML table.
    """

    def to_dict(self) -> dict[str, Any]: ...

    def to_frame(self) -> pd.DataFrame: ...

    def render(self) -> str: ...

    def __rich_console__(self, console: Console, options: ConsoleOptions) -> RenderResult: ...

    def _repr_html_(self) -> str: ...


if TYPE_CHECKING:  # mypy checks here that every report class satisfies the protocol

    def _every_report_is_a_report(
        v: VerifyReport, a: AuditReport, e: EstimateReport, s: SweepReport, i: IntegrityReport
    ) -> tuple[Report, ...]:
        return (v, a, e, s, i)
