"""drawledger.replay: verify, audit and estimate from a ledger (the analysis side)."""

from drawledger.replay._handle import LedgerHandle, LedgerOptions, open
from drawledger.replay._protocol import Report
from drawledger.replay.audit import AuditFigure, AuditReport, AuditTest, audit, audit_tables
from drawledger.replay.demo import DemoResult, run_demo
from drawledger.replay.estimate import Estimate, EstimateReport, SweepReport, estimate, sweep
from drawledger.replay.integrity import IntegrityReport, check_integrity
from drawledger.replay.propensity import Propensity, action_distribution, propensity
from drawledger.replay.report import HtmlReport, WhatIf, write_report
from drawledger.replay.sources import LedgerTables, iter_decision_chunks, read_tables
from drawledger.replay.verify import (
    DecisionView,
    VerifyReport,
    VersionsReport,
    code_versions,
    verify,
    verify_one,
    version_diff,
)

__all__: list[str] = [
    "AuditFigure",
    "AuditReport",
    "AuditTest",
    "DecisionView",
    "DemoResult",
    "Estimate",
    "EstimateReport",
    "HtmlReport",
    "IntegrityReport",
    "LedgerHandle",
    "LedgerOptions",
    "LedgerTables",
    "Propensity",
    "Report",
    "SweepReport",
    "VerifyReport",
    "VersionsReport",
    "WhatIf",
    "action_distribution",
    "audit",
    "audit_tables",
    "check_integrity",
    "code_versions",
    "estimate",
    "iter_decision_chunks",
    "open",
    "propensity",
    "read_tables",
    "run_demo",
    "sweep",
    "verify",
    "verify_one",
    "version_diff",
    "write_report",
]
