"""Progress over tiles: a tqdm bar (terminal or notebook) and log lines on logger "ntkcalc"."""

from __future__ import annotations

import logging

from tqdm.auto import tqdm

logger = logging.getLogger("ntkcalc")


def bar(total: int, *, enabled: bool, where: str = "", desc: str = "ntkcalc tiles",
        unit: str = "tile"):
    """A bar over ``total`` units with rate and ETA, shown once a run lasts over a second."""
    return tqdm(total=total, desc=f"{desc}{where}", unit=unit, disable=not enabled,
                dynamic_ncols=True, delay=1.0)
