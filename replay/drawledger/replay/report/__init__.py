"""The HTML report of a ledger: verification, audit and what-if estimates on one page."""

from drawledger.replay.report._write import HtmlReport, WhatIf, write_report

__all__: list[str] = ["HtmlReport", "WhatIf", "write_report"]
