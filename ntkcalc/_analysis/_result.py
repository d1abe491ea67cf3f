"""The base of every analysis result: a frozen dataclass with a short, readable repr.

The repr shows arrays by shape (never their contents), floats to four significant digits, and
small dicts and strings as they are, so a result printed in a notebook or a log stays one line.
"""

from __future__ import annotations

import dataclasses

import numpy as np


def _short(value) -> str:
    if value is None:
        return "None"
    if isinstance(value, np.ndarray):
        if value.ndim == 0:
            return _short(value.item())
        return f"array{tuple(value.shape)}"
    if isinstance(value, bool | np.bool_):
        return str(bool(value))
    if isinstance(value, int | np.integer):
        return str(int(value))
    if isinstance(value, float | np.floating):
        return f"{float(value):.4g}"
    if isinstance(value, dict):
        return "{" + ", ".join(f"{k!r}: {_short(v)}" for k, v in value.items()) + "}"
    if isinstance(value, tuple):
        return "(" + ", ".join(_short(v) for v in value) + ("," if len(value) == 1 else "") + ")"
    if isinstance(value, str):
        return repr(value)
    return type(value).__name__


class Result:
    """Mixin for frozen dataclasses: ``Name(field=short, ...)`` with arrays shown by shape."""

    def __repr__(self) -> str:
        parts = [
            f"{f.name}={_short(getattr(self, f.name))}"
            for f in dataclasses.fields(self)
            if f.repr
        ]
        return f"{type(self).__name__}({', '.join(parts)})"
