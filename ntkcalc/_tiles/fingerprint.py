"""What defines a kernel, as a small JSON-able record stored next to its tiles.

A resumed store must hold the kernel this call would compute. The record keeps a hash of every
parameter and state leaf (dtype, shape and bytes), a hash of the inputs, and the choices that change
the numbers: method, outputs mode, dtype, which parameters are differentiated, block size and shape.
The model's code is not hashed: two different functions with identical parameters and inputs
fingerprint alike, so use a new store when you change the model's code.
"""

from __future__ import annotations

import hashlib

import jax
import numpy as np

#: Fingerprint fields that may differ on resume and are then taken from the store (``method``
#: too, when the call asked for ``method="auto"``).
ADOPTABLE = ("block",)


def _update(h, arrays) -> None:
    for a in arrays:
        a = np.ascontiguousarray(np.asarray(a))
        h.update(f"{a.dtype.str}{a.shape}".encode())
        h.update(a.tobytes())


def array_hash(*arrays) -> str:
    """Hex BLAKE2b (128-bit) of the dtypes, shapes and bytes of ``arrays``."""
    h = hashlib.blake2b(digest_size=16)
    _update(h, arrays)
    return h.hexdigest()


def fingerprint(plan, req) -> dict:
    """The record of ``plan`` on ``req`` that a resumed store must match."""
    params = [*req.diff, *req.other, *jax.tree_util.tree_leaves(req.state)]
    inputs = [req.x1] if req.x2 is None else [req.x1, req.x2]
    sel = req.selection
    selected = [sel.names[i] for i in sel.indices]
    return {
        "params": array_hash(*params),
        "inputs": array_hash(*inputs),
        "symmetric": bool(plan.symmetric),
        "method": plan.method,
        "outputs": plan.outputs,
        "dtype": np.dtype(plan.dtype).name,
        "parameters": hashlib.blake2b("\n".join(selected).encode(), digest_size=8).hexdigest(),
        "groups": list(plan.group_names),
        "shape": list(plan.shape),
        "block": int(plan.block),
    }


def differences(stored: dict, now: dict) -> list[str]:
    """Names of the fields whose values differ (a field missing on one side differs)."""
    return sorted(k for k in set(stored) | set(now) if stored.get(k) != now.get(k))
