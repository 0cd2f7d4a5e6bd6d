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

from drawledger.draw import Draw
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
    than the one their arguments and uniforms give."""
    out = np.zeros(len(args), bool)
    if kind not in CHECKED_KINDS:
        return out
    rows = np.flatnonzero(check)
    if not len(rows):
        return out
    loaded_u = load_texts(u[rows])
    loaded_args = load_texts(args[rows])
    loaded_values = load_texts(values[rows])
    for i, a, us, v in zip(rows, loaded_args, loaded_u, loaded_values, strict=True):
        if not isinstance(us, list) or not us or not isinstance(a, dict) or v is BAD_JSON:
            continue
        try:
            value = value_from_uniforms(kind, a, us)
        except (DrawArgumentError, KeyError, TypeError):
            continue  # not a declaration of the kind: the parse reports it
        except ValueError:
            out[i] = True  # too few or too many uniforms for the draw
            continue
        out[i] = not _agrees(kind, value, v)
    return out
