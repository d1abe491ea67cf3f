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
    ``array`` is the underlying zarr array (groups, N1, N2, ...); ``info`` the run's counts.
    """

    def __init__(self, array, group: int, info: RunInfo):
        self.array = array
        self.group = group
        self.info = info
        self.kind: str | None = None  # the outputs mode, set by ntkcalc.ntk (see KernelArray)
        self.num_outputs: int | None = None

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
