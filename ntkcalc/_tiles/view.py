"""What a stored run returns: a read-only view of one kernel group on disk, and run counts."""

from __future__ import annotations

import dataclasses

import numpy as np


@dataclasses.dataclass(frozen=True)
class RunInfo:
    """Counts of one `ntkcalc.ntk` run over tiles.

    Fields:
        store: where the kernel is (None when it was built in memory).
        tiles: tiles of the whole kernel (upper triangle only for K(X, X)).
        computed: tiles this process computed in this run.
        reused: tiles found complete and verified in the store.
        repaired: of ``computed``, tiles that had a checksum but failed verification.
        block: examples per tile side; devices: devices this process used.
        process: (this process's index, number of processes).
    """

    store: str | None
    tiles: int
    computed: int
    reused: int
    repaired: int
    block: int
    devices: int
    process: tuple[int, int] = (0, 1)


class StoredKernel:
    """Read-only array view of a kernel (or one parameter group of it) held in a zarr store.

    ``view[i0:i1, j0:j1]`` reads only the tiles it touches; ``np.asarray(view)`` reads it all.
    ``shape``/``dtype`` are the kernel's ((N1, N2), (N1, N2, O) or (N1, N2, O, O));
    ``array`` is the underlying zarr array (groups, N1, N2, ...); ``info`` the run's counts;
    ``kind`` the outputs mode; ``source`` which checkpoint and model produced it, when the store
    records it (``ntkcalc kernel`` does: keys ``checkpoint``, ``step``, ``item``, ``subtree``,
    ``model``), else None.
    """

    def __init__(self, array, group: int, info: RunInfo):
        self.array = array
        self.group = group
        self.info = info
        self.kind: str | None = None  # the outputs mode, set by ntkcalc.ntk (see KernelArray)
        self.num_outputs: int | None = None
        self.source: dict | None = None

    @property
    def shape(self) -> tuple[int, ...]:
        return tuple(self.array.shape[1:])

    @property
    def dtype(self) -> np.dtype:
        return np.dtype(self.array.dtype)

    @property
    def ndim(self) -> int:
        return len(self.shape)

    def __len__(self) -> int:
        return self.shape[0]

    def __getitem__(self, key):
        key = key if isinstance(key, tuple) else (key,)
        return self.array[(self.group, *key)]

    def __array__(self, dtype=None, copy=None):
        out = self.array[self.group]
        return out if dtype is None else out.astype(dtype)

    def __repr__(self) -> str:
        return (f"StoredKernel(shape={self.shape}, dtype={self.dtype}, store={self.info.store!r}, "
                f"group={self.group})")


def open_kernel(path, *, group: int | str | None = None) -> StoredKernel:
    """Open a kernel store written by ``ntk(..., store=path)`` or ``ntkcalc kernel`` for reading.

    Every tile's checksum is verified first, so a view never holds a missing or damaged tile.

    Args:
        path: the store's directory (or a zarr URL).
        group: for a store of `ntkcalc.ntk_by_layer`, which parameter group (its index or name);
            a store of `ntkcalc.ntk` holds one group and needs none.

    Returns:
        A `StoredKernel` with ``kind`` (the outputs mode), ``num_outputs`` (the model's O,
        recorded in the store when it was written; for a store written before O was recorded,
        O from the shape of a 'full' or 'diagonal' kernel, else None), ``source`` (provenance,
        or None) and ``info``
        (``computed`` 0 and ``reused`` every tile: nothing was computed by opening it).

    Raises:
        ValueError: the path holds no ntkcalc kernel, a damaged or incomplete one, or ``group``
            is missing or unknown.
    """
    from .blocking import tiles
    from .store import describe, open_verified, read_num_outputs, read_source

    opened = open_verified(path, what="path")
    where = describe(path)
    if opened is None:
        raise ValueError(f"`path`={where!r} holds no ntkcalc kernel store: pass the `store` of "
                         "`ntk(..., store=...)` or of `ntkcalc kernel --store`.")
    ts, fp = opened
    names = list(fp["groups"])
    if group is None and len(names) == 1:
        index = 0
    elif isinstance(group, str) and group in names:
        index = names.index(group)
    elif isinstance(group, int) and not isinstance(group, bool) and 0 <= group < len(names):
        index = group
    else:
        raise ValueError(f"`group`={group!r}: the store {where!r} holds the parameter groups "
                         f"{names}; pass one of their names or an index below {len(names)}.")
    shape = fp["shape"]
    count = len(tiles(shape[0], shape[1], fp["block"], symmetric=fp["symmetric"]))
    info = RunInfo(where, count, 0, count, 0, int(fp["block"]), 0)
    view = StoredKernel(ts.kernel, index, info)
    view.kind = fp["outputs"]
    recorded = read_num_outputs(path)
    view.num_outputs = recorded if recorded is not None else (
        int(shape[2]) if len(shape) > 2 else None)
    view.source = read_source(path)
    return view
