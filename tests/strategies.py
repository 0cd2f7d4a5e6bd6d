"""Hypothesis strategies shared by the test modules (the one place they are defined)."""

from __future__ import annotations

from hypothesis import strategies as st

seeds = st.binary(min_size=16, max_size=16)
finite = st.floats(allow_nan=False, allow_infinity=False, width=64)
probabilities = st.floats(min_value=0.0, max_value=1.0, allow_nan=False)
json_scalars = st.one_of(
    st.none(),
    st.booleans(),
    st.integers(min_value=-(2**53), max_value=2**53),
    finite,
    st.text(max_size=20),
)
json_values = st.recursive(
    json_scalars,
    lambda inner: st.one_of(
        st.lists(inner, max_size=4), st.dictionaries(st.text(max_size=8), inner, max_size=4)
    ),
    max_leaves=12,
)


@st.composite
def prob_vectors(draw: st.DrawFn, min_size: int = 1, max_size: int = 8) -> list[float]:
    """Non-negative weights normalized to sum to 1 (within float rounding)."""
    weights = draw(
        st.lists(st.floats(0.0, 1e6, allow_nan=False), min_size=min_size, max_size=max_size)
        .filter(lambda w: sum(w) > 0)
    )
    total = sum(weights)
    return [w / total for w in weights]
