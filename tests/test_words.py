"""Counts in messages and summaries take the noun in the right number."""

from __future__ import annotations

import numpy as np

from ntkcalc._words import counted


def test_counted():
    assert counted(1, "output") == "1 output"
    assert counted(3, "output") == "3 outputs"
    assert counted(0, "output") == "0 outputs"
    assert counted(np.int64(1), "class") == "1 class"
    assert counted(2, "class") == "2 classes"
    assert counted(2, "matrix", "matrices") == "2 matrices"
    assert counted(12_000, "snapshot") == "12,000 snapshots"
    assert counted(1.0, "step") == "1 step" and counted(2.5, "step") == "2.5 steps"
