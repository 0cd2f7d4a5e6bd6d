"""Replay under the version that logged each record: find it in the git history of ``--path``.

For each (function, identity) a ledger records that is not the identity of the current code
under a ``--path`` directory, the history of the function's module file is searched
(``git log`` / ``git show``) for a revision whose function has that identity, computed from the
file's text (nothing is imported or run to search). Each revision found is materialized alone
(``git archive`` into a temporary directory) and its records are replayed in a process of its
own, with the same safe-import rules, so two versions of a module never share a process.
docs/deploys.md describes it.
"""

from __future__ import annotations

import ast
import io
import os
import re
import shutil
import subprocess
import tarfile
import tempfile
import textwrap
from collections.abc import Iterable
from dataclasses import dataclass, field
from pathlib import Path

from drawledger._code import CODE_IDENTITY_VERSION, source_identity

_NAME = re.compile(r"^[A-Za-z_]\w*(\.[A-Za-z_]\w*)*$")
MAX_REVISIONS = 500  # revisions of one file searched at most (newest first)


def _span(module_text: str, qualname: str) -> tuple[int, int, str] | None:
    """The first and last line of ``qualname`` (decorators included) in a module's text, and
    its indentation; None when the text does not parse or lacks it."""
    try:
        tree = ast.parse(module_text)
    except (SyntaxError, ValueError):
        return None
    body: list[ast.stmt] = tree.body
    node: ast.stmt | None = None
    for part in qualname.split("."):
        kinds = (ast.FunctionDef, ast.AsyncFunctionDef, ast.ClassDef)
        node = next((n for n in body if isinstance(n, kinds) and n.name == part), None)
        if node is None:
            return None
        body = node.body
    assert node is not None and node.end_lineno is not None
    first = min([node.lineno, *(d.lineno for d in getattr(node, "decorator_list", []))])
    return first, node.end_lineno, " " * node.col_offset


def function_text(module_text: str, qualname: str) -> str | None:
    """The dedented source of ``qualname`` (decorators included, as ``inspect.getsource`` reads
    it) in a module's text; None when the text does not parse or lacks it."""
    found = _span(module_text, qualname)
    if found is None:
        return None
    first, last, _ = found
    return textwrap.dedent("".join(module_text.splitlines(keepends=True)[first - 1 : last]))


def text_identity(module_text: str, qualname: str) -> str | None:
    """The code identity of ``qualname`` in a module's text (None: not there)."""
    source = function_text(module_text, qualname)
    if source is None:
        return None
    try:
        return source_identity(source)
    except SyntaxError:
        return None


def module_path(base: Path, module: str) -> Path | None:
    """The file of ``module`` under ``base`` (``a/b.py`` or ``a/b/__init__.py``), if any."""
    if not _NAME.match(module):
        return None
    rel = Path(*module.split("."))
    for candidate in (base / rel.with_suffix(".py"), base / rel / "__init__.py"):
        if candidate.is_file():
            return candidate
    return None


def _git(top: Path, *args: str, text: bool = True) -> subprocess.CompletedProcess[str] | None:
    try:
        done = subprocess.run(["git", "-C", str(top), *args], capture_output=True, text=text,
                              timeout=120, check=False)  # fmt: skip
    except (OSError, subprocess.SubprocessError):
        return None
    return done if done.returncode == 0 else None


def work_tree(directory: Path) -> Path | None:
    """The top of the git work tree ``directory`` lies in, or None."""
    done = _git(directory, "rev-parse", "--show-toplevel")
    return Path(done.stdout.strip()).resolve() if done is not None else None


@dataclass
class Found:
    """Where each wanted version was found: revision by (function, identity)."""

    revisions: dict[tuple[str, str], str] = field(default_factory=dict)
    bases: dict[str, tuple[Path, Path]] = field(default_factory=dict)  # rev: (top, --path dir)


def current_identities(fns: Iterable[str], path: Iterable[str]) -> dict[str, tuple[str, Path]]:
    """The identity of each function in the current files under the ``path`` directories, with
    the directory it was found under (functions not found there are left out)."""
    dirs = [Path(p).expanduser().resolve() for p in path]
    out: dict[str, tuple[str, Path]] = {}
    for fn in fns:
        module, _, qualname = fn.partition(":")
        for base in dirs:
            file = module_path(base, module)
            if file is None:
                continue
            try:
                identity = text_identity(file.read_text(encoding="utf-8"), qualname)
            except (OSError, UnicodeDecodeError):
                identity = None
            if identity is not None:
                out[fn] = (identity, base)
            break
    return out


def search(wanted: dict[str, set[str]], current: dict[str, tuple[str, Path]]) -> Found:
    """Search the git history of each function's module file for the wanted identities."""
    found = Found()
    for fn, identities in sorted(wanted.items()):
        if fn not in current:
            continue
        base = current[fn][1]
        top = work_tree(base)
        module, _, qualname = fn.partition(":")
        file = module_path(base, module)
        if top is None or file is None:
            continue
        rel = file.resolve().relative_to(top).as_posix()
        log = _git(top, "log", "--all", "--format=%H", f"--max-count={MAX_REVISIONS}", "--", rel)
        left = {i for i in identities if i.startswith(CODE_IDENTITY_VERSION)}
        for rev in log.stdout.split() if log is not None else []:
            if not left:
                break
            shown = _git(top, "show", f"{rev}:{rel}")
            identity = text_identity(shown.stdout, qualname) if shown is not None else None
            if identity in left:
                found.revisions[(fn, identity)] = rev
                found.bases[rev] = (top, base)
                left.discard(identity)
    return found


def materialize(top: Path, rev: str, into: Path) -> bool:
    """The tree of ``rev`` extracted under ``into`` (``git archive``); False when it failed."""
    done = _git(top, "archive", "--format=tar", rev, text=False)
    if done is None:
        return False
    with tarfile.open(fileobj=io.BytesIO(done.stdout)) as archive:  # type: ignore[arg-type]
        archive.extractall(into, filter="data")
    return True


def temporary_tree(top: Path, rev: str) -> Path | None:
    """A fresh temporary directory holding the tree of ``rev`` (the caller removes it)."""
    where = Path(tempfile.mkdtemp(prefix=f"drawledger-{rev[:12]}-"))
    if materialize(top, rev, where):
        return where
    shutil.rmtree(where, ignore_errors=True)
    return None


def moved_path(base: Path, top: Path, tree: Path) -> str:
    """The ``--path`` directory ``base`` of the work tree ``top`` inside a materialized tree."""
    return os.fspath(tree / base.relative_to(top))


def stored_tree(base: Path, fn: str, source: str) -> Path | None:
    """A fresh temporary copy of the ``--path`` directory ``base`` in which the function ``fn``
    (``module:qualname``) has the stored ``source`` instead of its current text (the caller
    removes it); None when the module or the function is not there."""
    module, _, qualname = fn.partition(":")
    file = module_path(base, module)
    if file is None:
        return None
    text = file.read_text(encoding="utf-8")
    found = _span(text, qualname)
    if found is None:
        return None
    first, last, indent = found
    lines = text.splitlines(keepends=True)
    body = textwrap.indent(source if source.endswith("\n") else source + "\n", indent)
    where = Path(tempfile.mkdtemp(prefix="drawledger-stored-"))
    tree = where / base.name
    shutil.copytree(base, tree, ignore=shutil.ignore_patterns(".git", "__pycache__"))
    patched = tree / file.relative_to(base)
    patched.write_text("".join([*lines[: first - 1], body, *lines[last:]]), encoding="utf-8")
    return where
