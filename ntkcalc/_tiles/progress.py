"""Progress over tiles: a tqdm bar (terminal or notebook) and log lines on logger "ntkcalc"."""

from __future__ import annotations

import logging

from tqdm.auto import tqdm

logger = logging.getLogger("ntkcalc")


def bar(total: int, *, enabled: bool, where: str):
    """A bar over ``total`` tiles with rate and ETA, shown once a run lasts over a second."""
    return tqdm(total=total, desc=f"ntkcalc tiles{where}", unit="tile", disable=not enabled,
                dynamic_ncols=True, delay=1.0)
