"""Safe imports of recorded decision functions, and rebuilding their inputs from JSON.

Replay never imports anything a ledger names unless the module lies under one of the ``path``
directories or its name starts with one of the ``allow`` prefixes; modules already imported in
this process are looked up without running any code. The resolved object must be a decision
registered with ``@ledger.decision`` (present in ``drawledger.ledger.REGISTRY``): anything else,
``os:system`` for example, is refused and never called.
"""

from __future__ import annotations

import functools
import importlib
import importlib.machinery
import math
import os
import re
import sys
import typing
from collections.abc import Callable, Iterable, Mapping
from pathlib import Path
from typing import Any

from pydantic import TypeAdapter, ValidationError

from drawledger._checks import is_array_annotation
from drawledger._records import from_json
from drawledger.exceptions import (
    BadRecordError,
    MissingFunctionError,
    NotADecisionError,
    NotAllowedError,
    ReplayError,
)
from drawledger.ledger import REGISTRY, Decision

__all__ = ["load_inputs", "load_params", "resolve_decision"]

_NAME = re.compile(r"^[A-Za-z_][\w]*(\.[A-Za-z_][\w]*)*$")
_SCALARS = (str, int, float, bool, type(None))


def _allowed_prefix(module: str, allow: Iterable[str]) -> bool:
    """``allow="shop"`` admits ``shop`` and ``shop.x`` (dotted boundaries), not ``shopping``."""
    for prefix in allow:
        prefix = prefix.rstrip(".")
        if prefix and (module == prefix or module.startswith(prefix + ".")):
            return True
    return False


def _under(origin: str | None, dirs: list[Path]) -> bool:
    if origin is None:
        return False
    where = Path(origin).resolve()
    return any(where.is_relative_to(d) for d in dirs)


def _package_module(base: Path, module: str) -> bool:
    """``a.b.c`` is ``base/a/b/c.py`` (or a package ``base/a/b/c/``) with ``base/a`` and
    ``base/a/b`` regular packages: folders without ``__init__.py`` are not imported from."""
    *parents, last = module.split(".")
    folder = base
    for part in parents:
        folder = folder / part
        if not (folder / "__init__.py").is_file():
            return False
    return (folder / f"{last}.py").is_file() or (folder / last / "__init__.py").is_file()


def lookup_qualname(obj: Any, qualname: str) -> Any:
    """Walk ``a.b.c`` through ``vars()`` only, so no attribute hook of the target runs."""
    for part in qualname.split("."):
        try:
            space = vars(obj)
        except TypeError:
            return None
        if part not in space:
            return None
        obj = space[part]
    return obj


def import_allowed(
    module: str, path: Iterable[str | os.PathLike[str]], allow: Iterable[str]
) -> Any:
    """Import ``module`` if it is allowed, else raise ``NotAllowedError`` (nothing runs)."""
    if "__main__" in module.split("."):
        raise NotAllowedError(
            f"module {module!r} is a script's entry point; replay never imports one "
            "(define decisions in an importable module)"
        )
    dirs = [Path(p).expanduser().resolve() for p in path]
    by_prefix = _allowed_prefix(module, allow)
    if not by_prefix and not any(_package_module(d, module) for d in dirs):
        raise NotAllowedError(
            f"module {module!r} is not under a --path directory or an --allow prefix (replay "
            "imports nothing else; under --path, every folder on its way needs an __init__.py)"
        )
    added = [str(d) for d in dirs if str(d) not in sys.path]
    sys.path[:0] = added
    try:
        loaded = importlib.import_module(module)
    except ModuleNotFoundError as exc:
        raise MissingFunctionError(f"module {module!r} cannot be imported: {exc}") from None
    except KeyboardInterrupt:
        raise  # Ctrl-C stops the whole run (exit 130, nothing reported)
    except BaseException as exc:  # SystemExit and the like fail this module's records only
        raise ReplayError(f"importing {module!r} failed: {type(exc).__name__}: {exc}") from None
    finally:
        for d in added:
            if d in sys.path:
                sys.path.remove(d)
    if not by_prefix and not _under(getattr(loaded, "__file__", None), dirs):
        raise NotAllowedError(f"module {module!r} was not found under the --path directories")
    return loaded


def resolve_decision(
    fn_name: str,
    *,
    path: Iterable[str | os.PathLike[str]] = (),
    allow: Iterable[str] = (),
) -> Decision[Any]:
    """The registered decision a ledger row names as ``module:qualname``.

    Raises ``BadRecordError`` for a malformed name, ``NotAllowedError`` when the module is not
    allowed (never imported), ``MissingFunctionError`` when it cannot be imported or lacks
    the function,
    ``NotADecisionError`` when the object is not a registered decision (never called), and
    ``ReplayError`` when importing the module raised.
    """
    if not isinstance(fn_name, str) or fn_name.count(":") != 1:
        raise BadRecordError(f"decision function name {fn_name!r} is not 'module:qualname'")
    module, qualname = fn_name.split(":")
    if not _NAME.match(module) or not _NAME.match(qualname):
        raise BadRecordError(f"decision function name {fn_name!r} is not 'module:qualname'")
    known = REGISTRY.get(fn_name)
    if known is not None:
        return known
    loaded = sys.modules.get(module)
    if loaded is None:
        loaded = import_allowed(module, path, allow)
        known = REGISTRY.get(fn_name)
        if known is not None:
            return known
    obj = lookup_qualname(loaded, qualname)
    if obj is None:
        raise MissingFunctionError(f"module {module!r} has no function {qualname!r}")
    raise NotADecisionError(
        f"{fn_name} is a {type(obj).__name__}, not a function registered with "
        "@ledger.decision; it was not called"
    )


# -- rebuilding inputs and parameters -------------------------------------------------------
Builder = Callable[[Any], Any]
_BUILDERS: dict[int, tuple[Decision[Any], dict[str, Builder | None]]] = {}


def _builders(decision: Decision[Any]) -> dict[str, Builder | None]:
    """How each typed input and policy parameter is rebuilt (``None``: keep the JSON)."""
    cached = _BUILDERS.get(id(decision))
    if cached is not None and cached[0] is decision:
        return cached[1]
    try:
        hints = typing.get_type_hints(decision.fn)
    except Exception:  # unresolvable annotations: keep every value as recorded JSON
        hints = {}
    out: dict[str, Builder | None] = {}
    for name in [*decision.inputs, *decision.params]:
        hint = hints.get(name)
        out[name] = None if hint is None or hint is Any or hint is object else _builder(hint)
    _BUILDERS[id(decision)] = (decision, out)
    return out


def _builder(hint: Any) -> Builder:
    """A numpy array annotation (``np.ndarray``, ``npt.NDArray[np.float32]``) rebuilds with
    ``numpy.asarray`` and its dtype; any other with pydantic. A type that pydantic cannot build
    fails each record that needs it (a ``replay-error``), not the run."""
    if is_array_annotation(hint):
        import numpy as np

        args = typing.get_args(hint)
        dtypes = typing.get_args(args[1]) if len(args) == 2 else ()
        dtype = dtypes[0] if dtypes and isinstance(dtypes[0], type) else None
        return functools.partial(np.asarray, dtype=dtype)
    try:
        return TypeAdapter(hint).validate_python
    except Exception as exc:  # pydantic has no schema for the type
        reason = f"{type(exc).__name__}: {str(exc).splitlines()[0]}"

        def cannot(value: Any) -> Any:
            raise ReplayError(
                f"its annotation {hint!r} cannot be rebuilt from the recorded JSON ({reason}); "
                "annotate it with a JSON type, a dataclass, a pydantic model or a numpy array"
            )

        return cannot


def _build(builder: Builder | None, value: Any, what: str) -> Any:
    if builder is None:
        return value
    try:
        return builder(value)
    except ValidationError as exc:
        first = exc.errors()[0]
        where = ".".join(str(x) for x in first["loc"])
        raise BadRecordError(
            f"{what}{'.' + where if where else ''}: {first['msg']} (recorded {value!r:.60})"
        ) from None
    except (ValueError, TypeError) as exc:  # numpy.asarray of a ragged or text value
        raise BadRecordError(f"{what}: {exc} (recorded {value!r:.60})") from None
    except ReplayError as exc:
        raise ReplayError(f"{what}: {exc}") from None


def parse_object(text: Any, what: str) -> dict[str, Any]:
    """A recorded JSON object (inputs, params); ``BadRecordError`` when it is anything else."""
    if not isinstance(text, str):
        raise BadRecordError(f"{what} is not JSON text (got {type(text).__name__})")
    try:
        obj = from_json(text)
    except ValueError as exc:
        raise BadRecordError(f"{what} is not valid JSON: {exc}") from None
    if not isinstance(obj, dict):
        raise BadRecordError(f"{what} is not a JSON object")
    return obj


def load_inputs(decision: Decision[Any], inputs_json: str) -> dict[str, Any]:
    """Rebuild a decision's inputs from their recorded JSON, by the function's type hints.

    Pydantic models, dataclasses and typed containers come back as such; untyped inputs stay
    plain JSON values. Raises ``BadRecordError`` on corrupt JSON, a missing input or a value
    of the wrong type.
    """
    return build_inputs(decision, parse_object(inputs_json, "inputs"))


def build_inputs(decision: Decision[Any], raw: Mapping[str, Any]) -> dict[str, Any]:
    """``load_inputs`` from the already parsed JSON object."""
    builders = _builders(decision)
    out = {}
    for name in decision.inputs:
        if name not in raw:
            raise BadRecordError(f"inputs: {name!r} is missing")
        out[name] = _build(builders[name], raw[name], f"input {name}")
    return out


def load_params(
    decision: Decision[Any], params_json: str | Mapping[str, Any], *, given: bool = False
) -> dict[str, Any]:
    """Policy parameters from their recorded JSON (or a mapping), by the function's type hints.

    Raises ``BadRecordError`` on corrupt JSON or a value of the wrong type, ``ReplayError``
    for a parameter the function no longer has. Parameters not given keep the function's
    defaults when it runs. ``given=True``: the values are a target policy's (``--set``), and
    a value of the wrong type is a ``ReplayError`` naming the expected type and the text given.
    """
    raw = (
        dict(params_json)
        if isinstance(params_json, Mapping)
        else parse_object(params_json, "params")
    )
    builders = _builders(decision)
    out = {}
    for name, value in raw.items():
        if name not in decision.params:
            raise ReplayError(f"{decision.name} has no policy parameter {name!r} any more")
        if isinstance(value, float) and not math.isfinite(value):
            raise BadRecordError(f"params: {name!r} is {value!r}")
        try:
            out[name] = _build(builders[name], value, f"param {name}")
        except BadRecordError:
            if not given:
                raise
            hint = typing.get_type_hints(decision.fn).get(name)
            expected = getattr(hint, "__name__", None) or str(hint).replace("typing.", "")
            got = f"the text {value!r:.60}" if isinstance(value, str) else f"{value!r:.60}"
            raise ReplayError(
                f"policy parameter {name}={value!r:.60} (given with --set or --baseline-set): "
                f"expected {expected}, got {got}"
            ) from None
    return out


def immutable(values: Mapping[str, Any]) -> bool:
    """True when every value is a JSON scalar (safe to share between runs)."""
    return all(isinstance(v, _SCALARS) for v in values.values())
