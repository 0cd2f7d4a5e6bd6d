"""The randomization audit: do the recorded draws follow their declared distributions?"""

from drawledger.replay.audit._collect import AuditState, chunk_state
from drawledger.replay.audit._limits import (
    AS_DECLARED,
    NOT_AS_DECLARED,
    NOT_ENOUGH_DATA,
    TEST_LABELS,
)
from drawledger.replay.audit._report import AuditFigure, AuditReport, AuditTest
from drawledger.replay.audit._run import audit, audit_tables

__all__ = [
    "AS_DECLARED",
    "NOT_AS_DECLARED",
    "NOT_ENOUGH_DATA",
    "TEST_LABELS",
    "AuditFigure",
    "AuditReport",
    "AuditState",
    "AuditTest",
    "audit",
    "audit_tables",
    "chunk_state",
]
