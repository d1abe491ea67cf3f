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


#: The type of every fingerprint field (a record read back must have exactly these).
FIELDS = {"params": str, "inputs": str, "symmetric": bool, "method": str, "outputs": str,
          "dtype": str, "parameters": str, "groups": list, "shape": list, "block": int}


def check_record(record) -> dict:
    """``record`` (a store's ``{"fingerprint": ..., "layout": ...}`` attribute) if it is whole.

    Raises ValueError saying what is wrong: not a mapping, a field missing or of the wrong type,
    a block size or shape that is not a positive integer.
    """
    if not isinstance(record, dict) or not isinstance(record.get("fingerprint"), dict):
        raise ValueError(f"expected {{'fingerprint': {{...}}, 'layout': ...}}, found {record!r}")
    fp = record["fingerprint"]
    missing = sorted(set(FIELDS) - set(fp))
    if missing:
        raise ValueError(f"fields {', '.join(missing)} are missing")
    for name, kind in FIELDS.items():
        value = fp[name]
        if not isinstance(value, kind) or (kind is int and isinstance(value, bool)):
            raise ValueError(f"field {name!r} is {value!r}, not a {kind.__name__}")
    sizes = [fp["block"], *fp["shape"]]
    if not all(isinstance(v, int) and not isinstance(v, bool) and v > 0 for v in sizes) or not (
            2 <= len(fp["shape"]) <= 4) or not fp["groups"]:
        raise ValueError(f"block {fp['block']!r}, shape {fp['shape']!r} or groups "
                         f"{fp['groups']!r} are not a kernel's")
    return record
