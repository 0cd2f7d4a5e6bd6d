"""The audit's thresholds, labels and verdicts."""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np
import numpy.typing as npt

if TYPE_CHECKING:
    pass


IntArray = npt.NDArray[np.int64]


U64Array = npt.NDArray[np.uint64]


GroupKey = tuple[str, str, "str | None"]  # stream, kind, draw name


# An alarm fires when a p-value, after Holm's correction across the tests of a stream, falls
# below ALPHA. 0.001 is common practice for sample-ratio-mismatch alarms; there is no single
# published source for it.
ALPHA = 0.001


# The rank-based tests and the repeat sketches keep at most this many values per draw (a
# bottom-k selection by a hash, so every chunk order gives the same sample). Below it they are
# exact on all draws.
SAMPLE_SIZE = 1_000_000


# Minimum sample sizes below which a test reports "not enough data" (common practice; chi-square
# tests instead need every expected cell count >= 5, see _stats.MIN_EXPECTED).
MIN_KS = 20


MIN_RANK = 30


# The consistency check names at most this many decisions whose value contradicts its uniforms.
MAX_EXAMPLES = 5


CONTRADICTS = "values contradict their uniforms (draw spec v1)"


# The assignment-ratio test keeps per-option sums for at most this many distinct options.
MAX_OPTIONS = 100


# At most this many numeric input fields are tested per draw (those present most often).
MAX_INPUT_FIELDS = 20


# The hour-of-day test bins PIT values into this many bins per hour.
HOUR_BINS = 5


# Declared-probability bins of the calibration test (left edges; the last bin is [0.9, 1]).
CAL_EDGES = np.array([0.0, 0.02, 0.05, 0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9])


# Recorded probabilities and densities must match the declared distribution to this relative
# tolerance.
PROB_RTOL = 1e-6


AS_DECLARED = "as declared"


NOT_AS_DECLARED = "not as declared"


NOT_ENOUGH_DATA = "not enough data"


CONTINUOUS_KINDS = frozenset({"uniform", "normal", "lognormal"})


OPTION_KINDS = frozenset(
    {"categorical", "bernoulli", "integers", "softmax", "epsilon_greedy", "bucket"}
)


TEST_LABELS = {
    "consistency": "matches declaration",
    "ratio": "assignment ratios",
    "calibration": "picks by probability",
    "uniforms_ks": "uniforms KS",
    "uniforms_chisq": "uniforms chi-square",
    "pit_ks": "PIT KS",
    "pit_chisq": "PIT chi-square",
    "uniforms_vs_time": "uniforms vs time order",
    "uniforms_vs_input": "uniforms vs input",
    "pit_vs_time": "PIT vs time order",
    "pit_vs_input": "PIT vs input",
    "pit_vs_hour": "PIT by hour of day",
    "unit_in_two_arms": "units in two arms",
    "unit_repeats": "arms repeat within units",
    "actions_without_draws": "no draw, yet actions vary (random or clock outside draw)",
    "repeated_seeds": "repeated seeds",
    "repeated_uniforms": "repeated uniforms",
}


HASH_KEY = b"drawledger.audit"  # blake2b key of decision ids and units (replay._keys)


STEP = np.uint64(0x9E3779B97F4A7C15)


SALT_V = np.uint64(0x5851F42D4C957F2D)  # PIT randomization


SALT_K = np.uint64(0x2545F4914F6CDD1D)  # sample selection


AUDIT_DECISION_COLUMNS = ("decision_id", "stream", "unit", "ts", "inputs", "seed")


UNDRAWN_COLUMNS = frozenset({"fn", "inputs", "params", "action"})  # decisions without draws


AUDIT_DRAW_COLUMNS = ("decision_id", "idx", "name", "kind", "args", "u", "value", "prob")


CAL_KEYS = [f"[{lo:g}, {hi:g})" for lo, hi in zip(CAL_EDGES, [*CAL_EDGES[1:], 1.0], strict=True)]
