"""Calibration and power of the audit on synthetic streams of the grocery scenario.

Calibration: correctly randomized streams raise an alarm in at most 1% of seeded runs.
Power: with 100,000 decisions, five kinds of faulty randomization are flagged in at least 99%
of seeded runs, and shoppers pinned to one arm with 1,600 decisions. The full runs (200 and
100 seeds) are marked slow; the default run checks a few seeds of each.
"""

from __future__ import annotations

from collections.abc import Callable

import audit_synth as synth
import numpy as np
import pandas as pd
import pytest

from drawledger.replay import audit_tables

Make = Callable[[np.random.Generator], tuple[pd.DataFrame, pd.DataFrame]]

CORRECT: dict[str, Make] = {
    "categorical": lambda r: synth.categorical(r, 5000, [0.6, 0.3, 0.1]),
    "softmax": lambda r: synth.softmax(r, 5000, 0.7),
    "lognormal": lambda r: synth.lognormal(r, 5000, 0.35),
    "bucket": lambda r: synth.bucket(r, 5000, units=3000),
    "repeat visits": lambda r: synth.repeat_visits(r, 1250, 4),
}

N = 100_000
FAULTY: dict[str, Make] = {
    "declared 0.5/0.5, drawn 0.52/0.48": lambda r: synth.categorical(
        r, N, [0.5, 0.5], [0.52, 0.48]
    ),
    "softmax declared T=0.7, drawn T=0.5": lambda r: synth.softmax(r, N, 0.7, 0.5),
    "lognormal declared sigma=0.35, drawn 0.30": lambda r: synth.lognormal(r, N, 0.35, 0.30),
    "uniforms reused across decisions": lambda r: synth.categorical(r, N, [0.6, 0.3, 0.1], reuse=2),
    "bucket share moves with the hour of day": lambda r: synth.bucket(
        r, N, units=60_000, hour_swing=0.05
    ),
    # far fewer decisions suffice: 400 shoppers, 4 visits each (1,600 decisions)
    "a fifth of the shoppers pinned to their first discount": lambda r: synth.repeat_visits(
        r, 400, 4, sticky=0.2
    ),
}


def alarms(make: Make, seeds: range) -> int:
    """In how many seeded runs the audit raised an alarm."""
    return sum(not audit_tables(*make(np.random.default_rng(seed))).ok for seed in seeds)


@pytest.mark.parametrize("kind", list(CORRECT))
def test_correct_streams_do_not_alarm(kind: str) -> None:
    """Short calibration run: 10 seeded runs of each correct stream, no alarm."""
    assert 0 == alarms(CORRECT[kind], range(10))


@pytest.mark.slow
@pytest.mark.parametrize("kind", list(CORRECT))
def test_correct_streams_alarm_in_at_most_one_percent_of_200_runs(kind: str) -> None:
    """Calibration: at alpha = 0.001 per stream (after Holm), at most 2 alarms in 200 runs."""
    assert alarms(CORRECT[kind], range(1000, 1200)) <= 2


@pytest.mark.parametrize("fault", list(FAULTY))
def test_faulty_randomization_is_flagged(fault: str) -> None:
    """Short power run: one seeded run of each fault with 100,000 decisions is flagged."""
    assert 1 == alarms(FAULTY[fault], range(1))


@pytest.mark.slow
@pytest.mark.parametrize("fault", list(FAULTY))
def test_faulty_randomization_is_flagged_in_99_of_100_runs(fault: str) -> None:
    """Power: with 100,000 decisions each fault is flagged in at least 99 of 100 runs."""
    assert alarms(FAULTY[fault], range(2000, 2100)) >= 99
