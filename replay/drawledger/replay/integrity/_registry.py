"""The registry part of the integrity check: the ledger's identity, its writers, their chains'
starts (docs/ledger.md, "Ledger identity and writer registry")."""

from __future__ import annotations

from drawledger import _records
from drawledger.replay.integrity._report import IntegrityReport
from drawledger.replay.sources import Registry


def check_registry(report: IntegrityReport, registry: Registry, key: bytes) -> None:
    """Compare the walked chains (``report.starts``, ``report.chained``) with the registry.

    A ledger from before the registry has none: each chain must start from null, as before.
    """
    if registry.identity is None:
        for writer, start in sorted(report.starts.items()):
            if start is not None:
                report.note_writer("broken_links", writer)
        return
    report.registry = True
    identity = registry.identity
    ledger_id, legacy = identity.get("ledger_id"), identity.get("legacy")
    if not (isinstance(ledger_id, str) and isinstance(legacy, str)) or identity.get(
        "tag"
    ) != _records.ledger_tag(ledger_id, legacy, key):
        report.note_writer("bad_registry", "(ledger identity)")
        return  # nothing can be checked against an identity that is not the ledger's
    registered: dict[str, str | None] = {}
    for writer, started, genesis, tag in registry.writers:
        try:
            ok = tag == _records.writer_tag(ledger_id, writer, started, genesis, key)
        except (TypeError, ValueError):  # a damaged row
            ok = False
        if not ok:
            report.note_writer("bad_registry", writer)
            continue
        registered[writer] = genesis
        if writer not in report.chained:
            report.note_writer("missing_writers", writer)
    for writer in sorted(report.chained):
        start = report.starts.get(writer, "")  # "": its seq 0 is missing (a gap already)
        bound = _records.genesis_hash(ledger_id, writer, key)
        if writer in registered:
            if start != "" and start != registered[writer]:
                report.note_writer("foreign_chains", writer)
        elif start not in ("", None) and start != bound:
            report.note_writer("foreign_chains", writer)
        elif start is None and legacy == "1":
            report.legacy_writers += 1
        else:
            report.note_writer("unregistered_writers", writer)
