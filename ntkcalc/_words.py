"""Wording shared by messages, summaries and reprs."""

from __future__ import annotations


def counted(n, noun: str, plural: str | None = None) -> str:
    """``n`` and ``noun`` in the number it takes: ``"1 output"``, ``"3 outputs"``, ``"2 classes"``.

    ``plural`` is the plural form when it is not ``noun + "s"`` (or ``"es"`` after s, x, ch, sh).
    A count of 1 (also ``1.0`` or a numpy integer) takes the singular; 0 and every other count
    the plural. ``n`` is shown as given (``f"{n:,}"`` for integers, so thousands are grouped).
    """
    if plural is None:
        plural = noun + ("es" if noun.endswith(("s", "x", "ch", "sh")) else "s")
    shown = f"{int(n):,}" if float(n).is_integer() else str(n)
    return f"{shown} {noun if n == 1 else plural}"
