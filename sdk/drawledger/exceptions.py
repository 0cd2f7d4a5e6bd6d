"""Every error drawledger raises on purpose.

Each class subclasses the builtin that matches the kind of mistake, so callers can catch
either the drawledger class or the builtin they already handle.
"""

from __future__ import annotations

__all__ = [
    "BadRecordError",
    "DecisionDefinitionError",
    "DrawArgumentError",
    "DrawledgerError",
    "DuplicateDecisionError",
    "EstimateRefusedError",
    "LedgerClosedError",
    "LedgerError",
    "MissingFunctionError",
    "NotADecisionError",
    "NotAllowedError",
    "NotSerializableError",
    "OutputError",
    "ReplayError",
    "UnreplayableDecisionWarning",
]


class DrawledgerError(Exception):
    """Base class of every drawledger error."""


class DrawArgumentError(DrawledgerError, ValueError):
    """A draw was called with arguments that do not define a valid distribution.

    The message names the draw (its kind and name) and the problem.
    """


class DuplicateDecisionError(DrawledgerError, ValueError):
    """A decision was given a ``decision_id`` that this ledger already recorded.

    Decision ids are unique per ledger: outcomes find their decision by its id. A retried
    request must not record its decision again.
    """


class NotSerializableError(DrawledgerError, TypeError):
    """A decision input, policy parameter, option or action cannot be recorded as JSON."""


class DecisionDefinitionError(DrawledgerError, TypeError):
    """A function cannot be registered as a decision (for example a reserved parameter name)."""


class LedgerError(DrawledgerError, OSError):
    """The ledger cannot be opened, read or written (bad path or URL, missing table, I/O)."""


class LedgerClosedError(LedgerError):
    """A record was offered to a ledger that was already closed."""


class ReplayError(DrawledgerError, RuntimeError):
    """Replay, audit or estimation could not run on the given ledger or arguments."""


class EstimateRefusedError(ReplayError):
    """An estimate was refused: the records it would use failed the integrity check or
    verification, and the caller did not accept those failures.

    A verdict about the data, not a usage error (the command line exits 1). ``check`` is
    "integrity" or "verification"; ``problems`` counts the failures by kind (an integrity
    problem such as ``bad_hashes``, or a verification reason such as ``action``).
    """

    def __init__(self, message: str, check: str = "", problems: dict[str, int] | None = None):
        super().__init__(message)
        self.check = check
        self.problems = dict(problems or {})

    def __reduce__(self) -> tuple[object, ...]:
        return (type(self), (str(self), self.check, self.problems))


class MissingFunctionError(ReplayError):
    """A ledger names a decision function that replay cannot find.

    Its module is not under a ``--path`` directory or an ``--allow`` prefix (so it was not
    imported), does not exist, or has no such function.
    """


class NotAllowedError(MissingFunctionError):
    """A ledger names a decision function whose module replay may not import: it is not under
    a ``--path`` directory or an ``--allow`` prefix, or it is a script's entry point. Nothing
    was imported."""


class NotADecisionError(ReplayError):
    """A ledger names an object that is not registered with ``@ledger.decision``; never called."""


class BadRecordError(ReplayError):
    """A ledger record cannot be decoded: corrupt JSON, NaN, wrong types, a malformed seed."""


class OutputError(DrawledgerError, OSError):
    """An output file (a JSON result, an export, a report, a plot) cannot be written where asked:
    its folder is missing or not writable, or the name is a folder."""


class UnreplayableDecisionWarning(UserWarning):
    """A decision is defined where replay cannot import it again (a script run as __main__)."""
