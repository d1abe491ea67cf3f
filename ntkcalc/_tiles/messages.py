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
