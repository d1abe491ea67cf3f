"""A kernel on disk: a zarr v3 group holding the kernel tile by tile and a checksum per tile.

Layout of ``<store>/``:

- ``kernel``: float array (groups, N1, N2, ...), one chunk per tile (``block × block``
  examples), no compression, fill value NaN so an unwritten tile reads as NaN;
- ``checksums``: uint64 array (row blocks, column blocks), one chunk per entry; entry (i, j) is
  written only after the tile's chunk(s) and is a BLAKE2b checksum of their bytes (0 = not done);
- attribute ``"ntkcalc"``: the kernel's fingerprint (see `fingerprint`).

For K(X, X) the tile (i, j), i < j, and its mirror (j, i) are both written, so the array on disk
is the whole kernel and any zarr reader can use it; the checksum covers both. A tile whose
checksum is missing, or whose chunks do not match it (truncated, corrupted, half-written when the
process was killed), counts as missing and is computed again.
"""

from __future__ import annotations

import dataclasses
import hashlib
import os

import numpy as np
import zarr

from .blocking import Tile, mirror, num_blocks
from .messages import NOT_A_STORE, STORE_UNWRITABLE

ATTR = "ntkcalc"
LAYOUT = 1


def describe(store) -> str:
    """A short text for logs and errors naming where the store is."""
    return os.fspath(store) if isinstance(store, str | os.PathLike) else repr(store)


def _is_local(store) -> bool:
    return isinstance(store, os.PathLike) or (isinstance(store, str) and "://" not in store)


def check_writable(store, *, tag: str = "") -> None:
    """Fail before any compute when a local ``store`` path cannot be created or written."""
    if not _is_local(store):
        return  # remote stores and store objects report errors when the group is created
    path = os.fspath(store)
    probe = os.path.join(path, f".ntkcalc-write-test-{os.getpid()}{tag}")
    try:
        os.makedirs(path, exist_ok=True)
        with open(probe, "wb") as f:
            f.write(b"ok")
        os.remove(probe)
    except OSError as e:
        raise PermissionError(
            STORE_UNWRITABLE.format(store=path, error=type(e).__name__)
        ) from e


def read_fingerprint(store) -> dict | None:
    """The fingerprint recorded in ``store``, or None when there is no ntkcalc store there."""
    try:
        group = zarr.open_group(store, mode="r")
    except (FileNotFoundError, zarr.errors.GroupNotFoundError, zarr.errors.NodeTypeValidationError):
        return None
    meta = group.attrs.get(ATTR)
    return None if meta is None else dict(meta["fingerprint"])


def _checksum(parts) -> int:
    h = hashlib.blake2b(digest_size=8)
    for p in parts:
        h.update(np.ascontiguousarray(p).tobytes())
    return int.from_bytes(h.digest(), "little") | 1  # never 0, which means "not done"


@dataclasses.dataclass(eq=False)
class TileStore:
    """An open kernel store; see the module docstring for the layout."""

    location: str
    kernel: zarr.Array
    checksums: zarr.Array
    symmetric: bool
    outputs: str

    @classmethod
    def create(cls, store, fingerprint: dict, plan) -> TileStore:
        """Create the store, or complete one whose creation was interrupted; never overwrites."""
        group = zarr.open_group(store, mode="a")
        shape = (len(plan.group_names),) + tuple(plan.shape)
        chunks = (shape[0], plan.block, plan.block) + shape[3:]
        nb = (num_blocks(plan.n1, plan.block), num_blocks(plan.n2, plan.block))
        config = {"write_empty_chunks": True}
        if ATTR not in group.attrs:
            if any(True for _ in group.keys()):
                raise ValueError(NOT_A_STORE.format(store=describe(store)))
            # The fingerprint goes first: a run killed while creating the arrays resumes them.
            group.attrs[ATTR] = {"fingerprint": fingerprint, "layout": LAYOUT}
        if "kernel" not in group:
            group.create_array("kernel", shape=shape, chunks=chunks, dtype=plan.dtype,
                               fill_value=np.nan, compressors=None, config=config)
        if "checksums" not in group:
            group.create_array("checksums", shape=nb, chunks=(1, 1), dtype="uint64",
                               fill_value=0, compressors=None, config=config)
        return cls.open(store, plan)

    @classmethod
    def open(cls, store, plan) -> TileStore:
        group = zarr.open_group(store, mode="r+")
        config = {"write_empty_chunks": True}  # config given to open_array would be ignored
        return cls(describe(store), group["kernel"].with_config(config),
                   group["checksums"].with_config(config), plan.symmetric, plan.outputs)

    # -- tiles ----------------------------------------------------------------------------------
    def _regions(self, t: Tile):
        yield (slice(None), slice(t.r0, t.r1), slice(t.c0, t.c1))
        if self.symmetric and t.i != t.j:
            yield (slice(None), slice(t.c0, t.c1), slice(t.r0, t.r1))

    def write(self, t: Tile, values: np.ndarray) -> None:
        """Write the tile (and its mirror), then its checksum: a tile is done only once both are."""
        values = np.ascontiguousarray(values, dtype=self.kernel.dtype)
        parts = [values]
        if self.symmetric and t.i != t.j:
            parts.append(np.ascontiguousarray(mirror(values, self.outputs)))
        for region, part in zip(self._regions(t), parts, strict=True):
            self.kernel[region] = part
        self.checksums[t.i, t.j] = np.uint64(_checksum(parts))

    def status(self, todo: list[Tile], *, verify: bool = True) -> tuple[list[Tile], int]:
        """(tiles still to compute, how many of them had a checksum but failed verification)."""
        done = self.checksums[...]
        missing, repaired = [], 0
        for t in todo:
            want = int(done[t.i, t.j])
            if want == 0:
                missing.append(t)
            elif verify and not self._intact(t, want):
                missing.append(t)
                repaired += 1
        return missing, repaired

    def _intact(self, t: Tile, want: int) -> bool:
        try:
            parts = [self.kernel[region] for region in self._regions(t)]
        except Exception:  # a truncated or garbled chunk fails to decode
            return False
        return _checksum(parts) == want

    def count_done(self) -> int:
        return int(np.count_nonzero(self.checksums[...]))
