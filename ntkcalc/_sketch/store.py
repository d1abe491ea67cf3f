"""Features on disk: a zarr v3 group with the features block by block and a checksum per block.

Layout of ``<store>/`` (the kernel store's conventions, `ntkcalc._tiles.store`):

- ``features``: float array (N·rows, k), one chunk per block of examples, no compression, fill
  value NaN so an unwritten block reads as NaN;
- ``checksums``: uint64 array (blocks,), one chunk per entry, written only after the block's chunk:
  a BLAKE2b checksum of its bytes (0 = not done);
- attribute ``"ntkcalc"``: the features' fingerprint (`fingerprint`), with ``"kind": "features"``
  so a kernel store is never taken for a features store or the reverse.

A block whose checksum is missing or does not match its chunk (killed mid-write, truncated,
corrupted) counts as missing and is computed again; a block is a pure function of the fingerprint,
so a resumed store is bit-identical to an uninterrupted one.
"""

from __future__ import annotations

import dataclasses
import hashlib

import jax
import numpy as np
import zarr

from .._tiles.fingerprint import array_hash
from .._tiles.store import ATTR, checksum, create_arrays, describe, open_arrays

#: Rows of the inputs hashed into the fingerprint (evenly spaced, plus the last one).
SAMPLED_ROWS = 64


def input_hash(x) -> str:
    """Hash of the inputs' shape, dtype and `SAMPLED_ROWS` evenly spaced rows: reading a million
    examples to fingerprint them would cost as much as a pass over the data."""
    n = x.shape[0]
    rows = sorted({int(i) for i in np.linspace(0, n - 1, min(n, SAMPLED_ROWS))})
    return array_hash(np.asarray([n]), *(np.asarray(x[i:i + 1]) for i in rows))


def read_fingerprint(store) -> dict | None:
    """The fingerprint recorded at ``store`` (a features or a kernel store), or None when there
    is no readable ntkcalc record there."""
    try:
        record = zarr.open_group(store, mode="r").attrs.get(ATTR)
    except (FileNotFoundError, zarr.errors.GroupNotFoundError,
            zarr.errors.NodeTypeValidationError):
        return None
    if not isinstance(record, dict) or not isinstance(record.get("fingerprint"), dict):
        return None
    return dict(record["fingerprint"])


def fingerprint(*, req, x, sketch, seed: int, outputs: str, block: int) -> dict:
    """The record a resumed features store must match."""
    params = [*req.diff, *req.other, *jax.tree_util.tree_leaves(req.state)]
    sel = req.selection
    selected = [sel.names[i] for i in sel.indices]
    return {
        "kind": "features",
        "params": array_hash(*params),
        "inputs": input_hash(x),
        "input_shape": list(x.shape),
        "input_dtype": np.dtype(x.dtype).name,
        "method": sketch.method,
        "outputs": outputs,
        "k": int(sketch.k),
        "seed": int(seed),
        "dtype": np.dtype(req.dtype).name,
        "parameters": hashlib.blake2b("\n".join(selected).encode(), digest_size=8).hexdigest(),
        "block": int(block),
    }


@dataclasses.dataclass(eq=False)
class FeatureStore:
    """An open features store; see the module docstring for the layout."""

    location: str
    features: zarr.Array
    checksums: zarr.Array
    rows: int  # rows of φ per example

    @classmethod
    def create(cls, store, fp: dict, *, n: int, rows: int, k: int, block: int,
               dtype) -> FeatureStore:
        """Create the store, or complete one whose creation was interrupted; never overwrites."""
        create_arrays(store, fp, {
            "features": dict(shape=(n * rows, k), chunks=(block * rows, k), dtype=dtype,
                             fill_value=np.nan),
            "checksums": dict(shape=(-(-n // block),), chunks=(1,), dtype="uint64",
                              fill_value=0),
        })
        return cls.open(store, rows)

    @classmethod
    def open(cls, store, rows: int) -> FeatureStore:
        features, sums = open_arrays(store, "features", "checksums")
        return cls(describe(store), features, sums, rows)

    def write(self, i: int, r0: int, values: np.ndarray) -> None:
        """Write block i (examples from r0), then its checksum: done only once both are."""
        values = np.ascontiguousarray(values, dtype=self.features.dtype)
        self.features[r0 * self.rows:r0 * self.rows + values.shape[0]] = values
        self.checksums[i] = np.uint64(checksum([values]))

    def status(self, todo: list[tuple[int, int, int]]) -> tuple[list, int]:
        """(blocks (i, r0, r1) still to compute, how many of them failed verification)."""
        done = self.checksums[...]
        missing, repaired = [], 0
        for i, r0, r1 in todo:
            want = int(done[i])
            if want == 0:
                missing.append((i, r0, r1))
                continue
            try:
                part = self.features[r0 * self.rows:r1 * self.rows]
                ok = checksum([part]) == want
            except Exception:  # a truncated or garbled chunk fails to decode
                ok = False
            if not ok:
                missing.append((i, r0, r1))
                repaired += 1
        return missing, repaired

    def count_done(self) -> int:
        return int(np.count_nonzero(self.checksums[...]))
