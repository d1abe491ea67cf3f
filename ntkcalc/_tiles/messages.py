"""Error and log messages used in more than one place of the tile layer."""

from __future__ import annotations

STORE_UNWRITABLE = (
    "`store`={store!r} is not writable ({error}): choose a directory you can write to."
)

STORE_MISMATCH = (
    "`store`={store!r} holds a different kernel: {fields} differ from this call "
    "(stored {stored}; now {now}). Resume only with the same net parameters, inputs, method, "
    "outputs, parameter filter and dtype, or choose a new `store` path."
)

STORE_NEEDED = (
    "the in-memory kernel ({result}) {why} `memory`={memory!r} ({budget}): pass `store=` "
    "(e.g. store='kernel.zarr') to write it to disk tile by tile, or raise `memory`."
)

STORE_INCOMPLETE = (
    "`store`={store!r} is missing {missing} of {total} tiles after every process finished: a "
    "process stopped early. Run the same call again to compute only the missing tiles."
)

NOT_A_STORE = (
    "`store`={store!r} holds zarr data that ntkcalc did not write: choose a new path (or delete "
    "it if it is a leftover)."
)

NON_FINITE_TILE = (
    "the kernel holds {count} non-finite value(s) ({kinds}) in the tile of x1 examples "
    "{r0}..{r1} × {other} examples {c0}..{c1}; first at K[{i}, {j}]. Rows (x1 examples) "
    "involved: {rows}; columns ({other} examples): {cols}. The model's outputs or their "
    "derivatives are not finite for these examples (e.g. sqrt or log of a negative number, "
    "division by zero, overflow or underflow in float32): evaluate `net(x1[[{i}]])` and its "
    "gradient to find the cause; in float32, enabling float64 (jax_enable_x64) may help."
)

ZERO_KERNEL = (
    "the kernel is exactly zero: the outputs do not depend on the differentiated parameters at "
    "these inputs, or their derivatives underflow (common in float32 with saturated "
    "activations; try float64 via jax_enable_x64)."
)

DISK_FULL = (
    "`store`={store!r}: the disk is full (free now: {free}); {need}. Free space (or choose a "
    "`store` on a larger disk) and run the same call again: it resumes from the tiles already "
    "written."
)

STORE_BUSY = (
    "ntkcalc: `store`={store!r} is in use by another process; waiting for it to "
    "finish, then this run resumes from its tiles (or is refused if it computes another kernel). "
    "Processes that share one kernel's work run under jax.distributed."
)

STORE_DAMAGED = (
    "ntkcalc: `store`={store!r} is damaged: {damage}. Its tiles cannot be matched to a kernel "
    "any more, so the kernel is recomputed from scratch into it."
)
