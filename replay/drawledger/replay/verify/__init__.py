"""Replay verification: every recorded decision re-executed and compared with its record."""

from drawledger.replay.verify._chunk import verify_chunk
from drawledger.replay.verify._export import BASE_COLUMNS
from drawledger.replay.verify._imports import (
    immutable,
    import_allowed,
    load_inputs,
    load_params,
    lookup_qualname,
    resolve_decision,
)
from drawledger.replay.verify._one import DecisionView, verify_one
from drawledger.replay.verify._report import VerifyReport
from drawledger.replay.verify._run import verify
from drawledger.replay.verify._types import (
    NOT_FAILING,
    REASONS,
    ChunkResult,
    Settings,
    absolute_paths,
)
from drawledger.replay.verify._versioned import (
    RevisionServer,
    VersionPlan,
    current_identities,
    in_revisions,
    plan_pairs,
    plan_versions,
)
from drawledger.replay.verify._versions import (
    CodeVersion,
    VersionsReport,
    code_versions,
    source_matches,
    unified_diff,
    version_diff,
)

__all__ = [
    "BASE_COLUMNS",
    "NOT_FAILING",
    "REASONS",
    "ChunkResult",
    "CodeVersion",
    "DecisionView",
    "RevisionServer",
    "Settings",
    "VerifyReport",
    "VersionPlan",
    "VersionsReport",
    "absolute_paths",
    "code_versions",
    "current_identities",
    "immutable",
    "import_allowed",
    "in_revisions",
    "load_inputs",
    "load_params",
    "lookup_qualname",
    "plan_pairs",
    "plan_versions",
    "resolve_decision",
    "source_matches",
    "unified_diff",
    "verify",
    "verify_chunk",
    "verify_one",
    "version_diff",
]
