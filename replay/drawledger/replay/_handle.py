"""``open``: a ledger with the settings every analysis shares, validated once.

``drawledger.replay.open("decisions.db", path=["."], jobs=2)`` returns a ``LedgerHandle`` whose
``verify``, ``audit``, ``estimate``, ``sweep``, ``report`` and ``check_integrity`` call the
public functions of the same names with those settings; each takes the rest of its function's
keywords. Nothing is read until one of them runs.
"""

from __future__ import annotations

import os
from collections.abc import Collection, Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Literal, TypedDict

from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator
from pydantic_core import ErrorDetails

from drawledger.exceptions import ReplayError
from drawledger.replay.audit import AuditReport, audit
from drawledger.replay.estimate import EstimateReport, SweepReport, estimate, sweep
from drawledger.replay.integrity import IntegrityReport, check_integrity
from drawledger.replay.report import HtmlReport, WhatIf, write_report
from drawledger.replay.verify import VerifyReport, verify

if TYPE_CHECKING:
    from typing import Unpack

PathLike = str | os.PathLike[str]

# What each option must be, for the error message that names a bad one.
EXPECTED = {
    "ledger": "a path or URL of a ledger (a non-empty string or path)",
    "format": "'parquet', 'sql', 'sqlite' or None (guessed from the ledger)",
    "path": "a list of directories (path=['src']), not a single string",
    "allow": "a list of module prefixes (allow=['shop']), not a single string",
    "integrity_key": "bytes, a string or None",
    "engine": "'local' or 'dask'",
    "scheduler": "the address of a Dask scheduler, or None",
    "jobs": "a positive integer",
    "progress": "True or False",
}
CARRIED = tuple(n for n in EXPECTED if n != "ledger")


class LedgerOptions(BaseModel):
    """The settings shared by verify, audit, estimate, sweep and the report (see ``open``)."""

    model_config = ConfigDict(frozen=True, extra="forbid", strict=True)

    ledger: str = Field(min_length=1)
    format: Literal["parquet", "sql", "sqlite"] | None = None
    path: tuple[str, ...] = ()
    allow: tuple[str, ...] = ()
    integrity_key: bytes | str | None = Field(default=None, repr=False)
    engine: Literal["local", "dask"] = "local"
    scheduler: str | None = None
    jobs: int = Field(default=1, ge=1)
    progress: bool = False

    @field_validator("ledger", mode="before")
    @classmethod
    def _ledger_text(cls, value: object) -> object:
        return os.fspath(value) if isinstance(value, os.PathLike) else value

    @field_validator("path", "allow", mode="before")
    @classmethod
    def _list_of_text(cls, value: object) -> object:
        if isinstance(value, str | bytes | os.PathLike) or not isinstance(value, Iterable):
            raise ValueError("not a list")
        return tuple(os.fspath(v) if isinstance(v, os.PathLike) else v for v in value)

    @model_validator(mode="after")
    def _scheduler_needs_dask(self) -> LedgerOptions:
        if self.scheduler is not None and self.engine != "dask":
            raise ValueError("a scheduler address needs engine='dask'")
        return self


def _problem(error: ErrorDetails) -> str:
    """One line naming the bad option of a pydantic error."""
    if not error["loc"]:
        return str(error["ctx"]["error"])
    name = str(error["loc"][0])
    value = error["input"]
    shown = f"a value of type {type(value).__name__}" if name == "integrity_key" else repr(value)
    return f"{name} must be {EXPECTED[name]}, got {shown}"


def options(ledger: PathLike, **settings: Any) -> LedgerOptions:
    """``LedgerOptions`` from keywords, or ``ReplayError`` naming every bad option."""
    try:
        return LedgerOptions.model_validate({"ledger": ledger, **settings})
    except ValidationError as exc:
        problems = dict.fromkeys(_problem(e) for e in exc.errors())
        raise ReplayError("; ".join(problems)) from None


class VerifyArgs(TypedDict, total=False):
    budget: int
    mc_samples: int
    export: PathLike | None
    keep_rows: bool
    chunk_size: int


class AuditArgs(TypedDict, total=False):
    alpha: float
    sample_size: int
    chunk_size: int


class SweepArgs(TypedDict, total=False):
    overrides: Mapping[str, Any] | None
    stream: str | None
    baseline: Mapping[str, Any] | str | None
    clip: float | None
    interval: str
    bootstrap: int
    level: float
    seed: int
    reward_range: tuple[float, float] | None
    missing_reward: float | None
    accept_integrity_failures: bool
    accept_verification_failures: Collection[str]


class EstimateArgs(SweepArgs, total=False):
    target: str | None
    by: str | None


class ReportArgs(TypedDict, total=False):
    verification: VerifyReport | None
    audit_report: AuditReport | None
    whatifs: Iterable[WhatIf]
    reward: str | None
    overrides: Mapping[str, Any] | None
    stream: str | None
    title: str | None
    accept_integrity_failures: bool
    accept_verification_failures: Collection[str]


class IntegrityArgs(TypedDict, total=False):
    chunk_size: int


@dataclass(frozen=True)
class LedgerHandle:
    """A ledger opened for analysis with its shared settings (``drawledger.replay.open``)."""

    options: LedgerOptions

    @property
    def ledger(self) -> str:
        return self.options.ledger

    def replace(self, **changes: Any) -> LedgerHandle:
        """The same ledger with some settings changed (validated again)."""
        return LedgerHandle(options(**{**self.options.model_dump(), **changes}))

    def _settings(self, names: Sequence[str], rest: Mapping[str, object]) -> dict[str, Any]:
        """The carried settings ``names``, refusing a call that passes one of them again."""
        for name in rest:
            if name in EXPECTED:
                raise ReplayError(f"{name} is set when the ledger is opened; use "
                                  f".replace({name}=...) for another value")  # fmt: skip
        return {name: getattr(self.options, name) for name in names}

    def verify(self, **rest: Unpack[VerifyArgs]) -> VerifyReport:
        """``verify`` of this ledger with every carried setting."""
        return verify(self.ledger, **self._settings(CARRIED, rest), **rest)

    def audit(self, **rest: Unpack[AuditArgs]) -> AuditReport:
        """``audit`` of this ledger (format, engine, scheduler and progress carried)."""
        names = ("format", "engine", "scheduler", "progress")
        return audit(self.ledger, **self._settings(names, rest), **rest)

    def estimate(self, reward: str, **rest: Unpack[EstimateArgs]) -> EstimateReport:
        """``estimate`` of the mean ``reward`` of a target policy, with every carried setting."""
        return estimate(self.ledger, reward=reward, **self._settings(CARRIED, rest), **rest)

    def sweep(
        self, reward: str, param: str, values: Sequence[Any], **rest: Unpack[SweepArgs]
    ) -> SweepReport:
        """``sweep`` of ``param`` over ``values``, with every carried setting."""
        settings = self._settings(CARRIED, rest)
        return sweep(self.ledger, reward=reward, param=param, values=values, **settings, **rest)

    def check_integrity(self, **rest: Unpack[IntegrityArgs]) -> IntegrityReport:
        """``check_integrity`` of this ledger (format and integrity key carried)."""
        return check_integrity(self.ledger, **self._settings(("format", "integrity_key"), rest),
                               **rest)  # fmt: skip

    def report(self, html: PathLike, **rest: Unpack[ReportArgs]) -> HtmlReport:
        """``write_report`` to ``html``; its verification and audit run with this handle's
        settings unless given (an estimate asked for with ``reward`` runs locally)."""
        names = ("path", "allow", "progress", "integrity_key")
        settings = self._settings(names, rest)
        if rest.get("verification") is None:
            rest["verification"] = self.verify()
        if rest.get("audit_report") is None:
            rest["audit_report"] = self.audit()
        return write_report(self.ledger, html, **settings, **rest)


def open(
    ledger: PathLike,
    *,
    format: str | None = None,
    path: Iterable[PathLike] = (),
    allow: Iterable[str] = (),
    integrity_key: bytes | str | None = None,
    engine: str = "local",
    scheduler: str | None = None,
    jobs: int = 1,
    progress: bool = False,
) -> LedgerHandle:
    """A handle on ``ledger`` carrying the settings every analysis shares.

    The settings are those of ``verify`` (``path``/``allow`` say where decision code may be
    imported from; ``integrity_key`` is the key of a keyed ledger), checked once here: a bad
    one raises ``ReplayError`` naming it. Nothing is read until a method of the handle runs.
    """
    return LedgerHandle(options(ledger, format=format, path=path, allow=allow,
                                integrity_key=integrity_key, engine=engine,
                                scheduler=scheduler, jobs=jobs, progress=progress))  # fmt: skip
