"""Declared values against their uniforms, by the SDK's own draw engine (draw spec v1).

A declared draw (``record_draw``, ``drawledger ingest``) that carries the uniforms it used
fixes its value: the SDK's ``Draw``, fed those uniforms in place of a seed's stream, must
return the recorded value from the recorded arguments. A value that another rule produced (a
faulty port, a value picked first and uniforms made up after) contradicts them.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from typing import TYPE_CHECKING, Any

import numpy as np
import numpy.typing as npt
import pandas as pd

from drawledger._probability import option_probabilities
from drawledger.draw import Draw, categorical_index
from drawledger.exceptions import DrawArgumentError
from drawledger.replay.audit._declared import BAD_JSON, canon, load_texts
from drawledger.replay.audit._limits import CONTINUOUS_KINDS

if TYPE_CHECKING:
    pass


# Continuous values may come from another implementation of AS241 and exp: values agreeing to
# this relative tolerance follow from their uniforms (common practice: far above the rounding
# differences of double arithmetic, about 1e-15, far below any other value of the draw).
VALUE_RTOL = 1e-9


# The draw methods the check calls, with the recorded arguments they take (by name).
_PARAMETERS: dict[str, tuple[str, ...]] = {
    "categorical": ("options", "probs"),
    "bernoulli": ("p",),
    "integers": ("low", "high"),
    "softmax": ("options", "scores", "temperature"),
    "epsilon_greedy": ("options", "scores", "epsilon"),
    "slate": ("options", "weights", "k"),
    "uniform": ("low", "high"),
    "normal": ("mean", "sd"),
    "lognormal": ("mu", "sigma"),
}


CHECKED_KINDS = frozenset(_PARAMETERS)


class _Exhausted(Exception):
    """The draw needed more uniforms than were recorded."""


class _FedDraw(Draw):
    """A ``Draw`` whose uniforms are the recorded ones instead of a seed's stream."""

    __slots__ = ("_fed", "taken")

    def __init__(self, uniforms: Sequence[float]) -> None:
        super().__init__(bytes(16))
        self._fed = list(uniforms)
        self.taken = 0

    def _uniform(self) -> float:
        n = self.taken
        if n >= len(self._fed):
            raise _Exhausted
        self.taken = n + 1
        return float(self._fed[n])


def value_from_uniforms(kind: str, args: dict[str, Any], uniforms: Sequence[float]) -> Any:
    """The value draw spec v1 gives for ``args`` and these uniforms (all of them used).

    Raises ``ValueError`` when the draw needs more uniforms than given or uses fewer, and
    ``DrawArgumentError`` (or ``KeyError`` for a missing one) when the arguments are not
    those of the kind.
    """
    draw = _FedDraw(uniforms)
    method: Callable[..., Any] = getattr(draw, kind)
    try:
        value = method(**{k: args[k] for k in _PARAMETERS[kind]})
    except _Exhausted:
        raise ValueError(f"the draw needs more than {len(uniforms)} uniforms") from None
    if draw.taken != len(uniforms):
        raise ValueError(f"the draw uses {draw.taken} of {len(uniforms)} uniforms")
    return value


def _agrees(kind: str, value: Any, recorded: Any) -> bool:
    if kind in CONTINUOUS_KINDS:
        if isinstance(recorded, bool) or not isinstance(recorded, (int, float)):
            return False
        x = float(recorded)
        return math.isfinite(x) and abs(x - value) <= VALUE_RTOL * max(abs(x), abs(value))
    return canon(value) == canon(recorded)


def contradicting(
    kind: str,
    args: npt.NDArray[Any],
    u: npt.NDArray[Any],
    values: npt.NDArray[Any],
    check: npt.NDArray[np.bool_],
) -> npt.NDArray[np.bool_]:
    """Which draws (among ``check``, with at least one recorded uniform) have a value other
    than the one their arguments and uniforms give.

    Kinds that pick one of their options with one uniform read the options and probabilities
    once per distinct declaration (``option_probabilities``) and apply the SDK's picking rule
    (``categorical_index``) per draw; the other kinds run the SDK's ``Draw`` per draw.
    """
    out = np.zeros(len(args), bool)
    if kind not in CHECKED_KINDS:
        return out
    rows = np.flatnonzero(check)
    if not len(rows):
        return out
    a_codes, a_uniq = pd.factorize(args[rows], use_na_sentinel=False)
    v_codes, v_uniq = pd.factorize(values[rows], use_na_sentinel=False)
    loaded_args = load_texts(a_uniq)
    recorded = load_texts(v_uniq)
    recorded_keys = [None if v is BAD_JSON else canon(v) for v in recorded]
    picks = [_picks(kind, a) for a in loaded_args] if kind in PICK_KINDS else None
    for i, a, us, v in zip(rows.tolist(), a_codes.tolist(), load_texts(u[rows]),
                           v_codes.tolist(), strict=True):  # fmt: skip
        if not isinstance(us, list) or not us or recorded[v] is BAD_JSON:
            continue
        if picks is not None:
            found = picks[a]
            if found is None:
                continue  # not a declaration of the kind: the parse reports it
            keys, probs = found
            out[i] = (
                len(us) != 1 or keys[categorical_index(probs, float(us[0]))] != recorded_keys[v]
            )
            continue
        args_a = loaded_args[a]
        if not isinstance(args_a, dict):
            continue
        try:
            value = value_from_uniforms(kind, args_a, us)
        except (DrawArgumentError, KeyError, TypeError):
            continue
        except ValueError:
            out[i] = True  # too few or too many uniforms for the draw
            continue
        out[i] = not _agrees(kind, value, recorded[v])
    return out


PICK_KINDS = frozenset({"categorical", "softmax", "epsilon_greedy", "bernoulli"})


def _picks(kind: str, a: Any) -> tuple[list[str], list[float]] | None:
    """The options (canonical JSON) and probabilities of a declaration, as the SDK draws them."""
    if not isinstance(a, dict):
        return None
    try:
        options, probs = option_probabilities(kind, a)
    except (DrawArgumentError, TypeError):
        return None
    return [canon(o) for o in options], probs
