"""Where a kernel is stored, and what a store there already holds (read before planning).

The request planner (`plan.plan`) reads a store's record so that the plan of a resumed run
adopts the store's tile size and method; the tile layer (`drive.compute`) checks it again under
the store's lock before writing.
"""

from __future__ import annotations

import os

from .store import describe, inspect


def check_store(store):
    """``store`` unchanged if it is None, a path, a URL or a zarr store object."""
    if store is None or isinstance(store, str | os.PathLike):
        return store
    import zarr.abc.store

    if isinstance(store, zarr.abc.store.Store):
        return store
    raise ValueError(
        f"`store`={store!r} is not a store location: pass a directory path such as "
        "'kernel.zarr', a URL zarr can open, or a zarr store object."
    )


def stored_fingerprint(store) -> tuple[str, dict | None]:
    """(where ``store`` is, the fingerprint of the kernel it holds, or None when it is empty or
    damaged): what the planner adopts a resumed store's tiles and method from."""
    store = check_store(store)
    found = inspect(store)
    return describe(store), (None if found.damage else found.fingerprint)
