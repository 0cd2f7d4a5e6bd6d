"""Code identity: what identifies the version of a decision function's code (docs/deploys.md).

The identity hashes the function's syntax tree, so comments, blank lines, formatting and
docstrings do not change it; it is computed once when the function is decorated. Identities
recorded before carry no version prefix and are compared as they were computed then
(``legacy_code_hash``).
"""

from __future__ import annotations

import ast
import hashlib
import inspect
import textwrap
import tokenize
from collections.abc import Callable
from pathlib import Path
from typing import Any

__all__ = [
    "CODE_IDENTITY_VERSION",
    "code_hash",
    "function_source",
    "legacy_code_hash",
    "module_file",
    "normalized_source",
    "same_code",
    "source_identity",
]


CODE_IDENTITY_VERSION = "v2:"
"""The prefix of a code identity computed by ``code_hash`` (docs/deploys.md); an identity
without it was recorded before, as ``legacy_code_hash`` computes it."""


def legacy_code_hash(fn: Callable[..., Any]) -> str:
    """The code identity recorded before v2: a hash of the source text as it is (comments too),
    or of the bytecode when the source is not available. Verify compares such a recorded
    identity with this hash of the current source."""
    try:
        data = textwrap.dedent(inspect.getsource(fn)).encode()
    except (OSError, TypeError, SyntaxError, tokenize.TokenError):
        # No readable source (REPL, exec'd code, a file changed on disk): hash the bytecode.
        code = fn.__code__
        data = code.co_code + repr(code.co_consts).encode()
    return hashlib.blake2b(data, digest_size=16).hexdigest()


def _is_docstring(node: ast.stmt) -> bool:
    return (isinstance(node, ast.Expr) and isinstance(node.value, ast.Constant)
            and isinstance(node.value.value, str))  # fmt: skip


def _canonical(node: Any) -> Any:
    """An AST as nested lists: node type and its fields, without positions, docstrings, or
    fields that are empty (so a field a later Python adds with an empty default, such as
    ``type_params``, does not change the identity)."""
    if isinstance(node, ast.AST):
        out: list[Any] = [type(node).__name__]
        body_owner = isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef, ast.ClassDef))
        for name, value in ast.iter_fields(node):
            if body_owner and name == "body" and value and _is_docstring(value[0]):
                value = value[1:] or [ast.Pass()]
            if value is None or value == []:
                continue
            out.append([name, _canonical(value)])
        return out
    if isinstance(node, list):
        return [_canonical(item) for item in node]
    return [type(node).__name__, repr(node)]


def normalized_source(source: str) -> str:
    """What the code identity hashes: the syntax tree of ``source`` (dedented) without
    comments, blank lines, formatting and docstrings. Raises SyntaxError for invalid code."""
    tree = ast.parse(textwrap.dedent(source))
    return repr(_canonical(tree.body))


def source_identity(source: str) -> str:
    """The code identity of a function's source text (``code_hash`` of a function with it)."""
    digest = hashlib.blake2b(normalized_source(source).encode(), digest_size=16)
    return CODE_IDENTITY_VERSION + digest.hexdigest()


def function_source(fn: Callable[..., Any]) -> str | None:
    """The dedented source text of a function, or None when it cannot be read."""
    try:
        return textwrap.dedent(inspect.getsource(fn))
    except (OSError, TypeError, SyntaxError, tokenize.TokenError):
        return None


def module_file(fn: Callable[..., Any]) -> str | None:
    """The path of the function's module relative to its import root (``shop/cards.py``),
    from the module's name; None for a module that is not a file."""
    try:
        where = inspect.getsourcefile(fn)
    except TypeError:
        where = None
    if where is None or not Path(where).is_file():
        return None
    parts = fn.__module__.split(".")
    if Path(where).name == "__init__.py":
        return "/".join([*parts, "__init__.py"])
    return "/".join(parts) + Path(where).suffix


def code_hash(fn: Callable[..., Any]) -> str:
    """The function's code identity: ``v2:`` and a hash of its syntax tree, blind to comments,
    blank lines, formatting and docstrings (docs/deploys.md). Without readable source, the
    bytecode hash of ``legacy_code_hash``."""
    source = function_source(fn)
    if source is None:
        return legacy_code_hash(fn)
    try:
        return source_identity(source)
    except SyntaxError:
        return legacy_code_hash(fn)


def same_code(recorded: str | None, fn: Callable[..., Any], identity: str) -> bool:
    """Whether a recorded identity is the one of ``fn`` (whose current identity is
    ``identity``): a versioned one compared as it is, an old one with the old hash."""
    if recorded is None or recorded.startswith(CODE_IDENTITY_VERSION):
        return recorded == identity
    return recorded == legacy_code_hash(fn)
