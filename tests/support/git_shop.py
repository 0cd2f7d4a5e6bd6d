"""A git repository holding one decision module of the grocery app, deployed several times.

Each deploy commits the module, imports it afresh and logs decisions with it, as a service
does after a deploy; verify and estimate then replay the records from the history.
"""

from __future__ import annotations

import importlib
import subprocess
import sys
import uuid
from collections.abc import Callable
from pathlib import Path
from types import ModuleType

from drawledger.ledger import REGISTRY

MODULE = """import drawledger as dl

ledger = dl.Ledger({target!r}, format={format!r}, integrity_key={key!r})


@ledger.decision("recipe-card")
def feature_card({arg}: {arg_type}, draw: dl.Draw, *, temperature: float = 0.7) -> str:
    cards = {cards}
{body}
"""
CARDS = ["one-pot-pasta", "green-curry", "taco-night", "lentil-soup"]


def git(repo: Path, *args: str) -> str:
    done = subprocess.run(
        ["git", "-c", "user.name=Grocery Dev", "-c", "user.email=dev@grocery.invalid",
         "-c", "init.defaultBranch=main", "-C", str(repo), *args],
        capture_output=True, text=True, check=True,
    )  # fmt: skip
    return done.stdout.strip()


def log_scores(module: ModuleType, n: int) -> None:
    """``n`` decisions over fixed scores, one per invented shopper."""
    for i in range(n):
        module.feature_card([1.0 + i % 3, 2.0, 0.5, 1.5], unit=f"shopper-{i}")


class Shop:
    """The repository, its ledger and the module's name (fresh per test)."""

    def __init__(self, root: Path, format: str | None = None, url: str | None = None, *,
                 arg: str = "scores", arg_type: str = "list[float]",
                 cards: str = repr(CARDS), key: str | None = None) -> None:  # fmt: skip
        self.repo = root / "shop"
        self.repo.mkdir()
        self.format = format
        self.ledger: Path | str = url or root / (
            "ledger" if format == "parquet" else "decisions.db"
        )
        self.name = f"cards_{uuid.uuid4().hex[:8]}"
        self.head = {"arg": arg, "arg_type": arg_type, "cards": cards, "key": key}
        git(self.repo, "init", "-q")

    def deploy(self, body: str, n: int, message: str,
               log: Callable[[ModuleType, int], None] = log_scores) -> str:  # fmt: skip
        """Commit the module with ``body``, then ``log`` ``n`` decisions with it; its identity."""
        self.commit(body, message)
        sys.path.insert(0, str(self.repo))
        try:
            module = importlib.import_module(self.name)
            log(module, n)
            module.ledger.close()
            return str(module.feature_card.code_hash)
        finally:
            sys.path.remove(str(self.repo))
            self.forget()

    def commit(self, body: str, message: str) -> None:
        """The module with ``body``, written and committed."""
        file = self.repo / f"{self.name}.py"
        file.write_text(MODULE.format(target=str(self.ledger), format=self.format, body=body,
                                      **self.head))  # fmt: skip
        git(self.repo, "add", file.name)
        git(self.repo, "commit", "-q", "-m", message)

    def deploy_elsewhere(self, body: str, n: int, message: str) -> None:
        """Like ``deploy`` (with ``log_scores``), the decisions logged by another process: this
        one keeps the modules it imported."""
        self.commit(body, message)
        code = (f"import sys; sys.path[:0] = [{str(self.repo)!r}, {str(Path(__file__).parent)!r}]"
                f"; import {self.name} as m, git_shop; git_shop.log_scores(m, {n}); "
                "m.ledger.close()")  # fmt: skip
        subprocess.run([sys.executable, "-c", code], check=True, capture_output=True)

    def forget(self) -> None:
        sys.modules.pop(self.name, None)
        for key in [k for k in REGISTRY if k.startswith(self.name + ":")]:
            del REGISTRY[key]
