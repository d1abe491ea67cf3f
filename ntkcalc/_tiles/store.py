"""A kernel on disk: a zarr v3 group holding the kernel tile by tile and a checksum per tile.

Layout of ``<store>/``:

- ``kernel``: float array (groups, N1, N2, ...), one chunk per tile (``block × block``
  examples), no compression, fill value NaN so an unwritten tile reads as NaN;
- ``checksums``: uint64 array (row blocks, column blocks), one chunk per entry; entry (i, j) is
  written only after the tile's chunk(s) and is a BLAKE2b checksum of their bytes (0 = not done);
- attribute ``"ntkcalc"``: the kernel's fingerprint (see `fingerprint`) and the model's number of
  outputs O (``"num_outputs"``, beside the fingerprint: a trace kernel's shape does not show it);
- attribute ``"ntkcalc_source"`` (optional): which checkpoint (path, step) and model produced the
  kernel, written by ``ntkcalc kernel`` (`record_source`).

For K(X, X) the tile (i, j), i < j, and its mirror (j, i) are both written, so the array on disk
is the whole kernel and any zarr reader can use it; the checksum covers both. A tile whose
checksum is missing, or whose chunks do not match it (truncated, corrupted, half-written when the
process was killed), counts as missing and is computed again; so does a tile whose checksum chunk
cannot be read.

Damage to the store's own metadata (a ``zarr.json`` that does not parse, a fingerprint that is
missing, incomplete or disagrees with the arrays) is found by `inspect`: such a store's tiles can
no longer be matched to a kernel, so the run recomputes it from scratch (with a warning in the log).

A local store is locked while a process creates it and, for a single-process run, while it
computes (an advisory ``flock`` on the store's directory, which zarr never replaces; released by
the operating system when the process dies, even by SIGKILL). A second independent process on
the same store waits, then finds the tiles done (or is refused when its kernel differs);
processes of one multi-host JAX run share the work instead (see `placement`). Remote stores
(URLs, store objects) are not locked; zarr writes each file atomically (temporary + rename).
"""

from __future__ import annotations

import contextlib
import dataclasses
import errno
import hashlib
import logging
import math
import os
import shutil
import threading

import numpy as np
import zarr

from .blocking import Tile, mirror, num_blocks
from .fingerprint import check_record
from .messages import DISK_FULL, NOT_A_STORE, STORE_BUSY, STORE_UNWRITABLE

logger = logging.getLogger("ntkcalc")

ATTR = "ntkcalc"
SOURCE_ATTR = "ntkcalc_source"
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
    # one name per process *and* thread: two calls on one store at once must not remove each
    # other's probe (which read as "not writable")
    probe = os.path.join(path, f".ntkcalc-write-test-{os.getpid()}-{threading.get_ident()}{tag}")
    try:
        os.makedirs(path, exist_ok=True)
        with open(probe, "wb") as f:
            f.write(b"ok")
        os.remove(probe)
    except OSError as e:
        with contextlib.suppress(OSError):
            os.remove(probe)
        if e.errno in (errno.ENOSPC, errno.EDQUOT):
            raise disk_full(store, needed=None) from e
        raise PermissionError(
            STORE_UNWRITABLE.format(store=path, error=type(e).__name__)
        ) from e


def free_bytes(store) -> int | None:
    """Bytes free on the filesystem of a local ``store`` (None for remote stores)."""
    if not _is_local(store):
        return None
    try:
        return shutil.disk_usage(os.fspath(store)).free
    except OSError:
        return None


def disk_full(store, *, needed: int | None) -> OSError:
    """The error for a full disk: where, how much is free and needed, and that a rerun resumes."""
    from .._engine.cost import format_bytes

    free = free_bytes(store)
    need = (f"it needs about {format_bytes(needed)} more for the tiles still to compute"
            if needed is not None else "it needs room for the tiles still to compute")
    return OSError(errno.ENOSPC, DISK_FULL.format(
        store=describe(store), free="unknown" if free is None else format_bytes(free), need=need))


def is_disk_full(err: BaseException) -> bool:
    return isinstance(err, OSError) and err.errno in (errno.ENOSPC, errno.EDQUOT)


@contextlib.contextmanager
def locked(store):
    """Hold the store's lock (local stores only; see the module docstring), waiting for it."""
    if not _is_local(store):
        yield
        return
    try:
        import fcntl
    except ImportError:  # no flock on this platform: unlocked, as for remote stores
        yield
        return
    fd = os.open(os.fspath(store), os.O_RDONLY)  # the directory itself: zarr never replaces it
    try:
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            logger.warning(STORE_BUSY.format(store=describe(store)))
            fcntl.flock(fd, fcntl.LOCK_EX)
        except OSError as e:  # a filesystem without flock (some network mounts): go on unlocked
            logger.warning("ntkcalc: `store`=%r cannot be locked (%s): run one process per store "
                           "path, or several under jax.distributed.", describe(store), e)
        yield
    finally:
        os.close(fd)  # releases the lock


def read_fingerprint(store) -> dict | None:
    """The fingerprint recorded in ``store``, or None when there is none that can be read."""
    try:
        group = zarr.open_group(store, mode="r")
        return dict(check_record(group.attrs.get(ATTR))["fingerprint"])
    except Exception:  # noqa: BLE001 - absent, foreign or damaged: `inspect` says which
        return None


@dataclasses.dataclass(frozen=True)
class Found:
    """What `inspect` found at a store location.

    fingerprint: the readable, consistent fingerprint (None when there is none);
    damage: what is damaged in an ntkcalc store's metadata ("" when nothing is).
    """

    fingerprint: dict | None
    damage: str = ""


def _tile_arrays_present(store) -> bool:
    """Whether the two ntkcalc arrays exist at ``store`` (even when the group metadata does not)."""
    if _is_local(store):
        path = os.fspath(store)
        return all(os.path.isdir(os.path.join(path, n)) for n in ("kernel", "checksums"))
    for name in ("kernel", "checksums"):
        try:
            zarr.open_array(store, path=name, mode="r")
        except Exception:  # noqa: BLE001
            return False
    return True


def inspect(store) -> Found:
    """Look at ``store`` before a run: empty, an intact ntkcalc store, a damaged one, or foreign.

    Raises ValueError (`NOT_A_STORE`) for zarr data ntkcalc did not write.
    """
    where = describe(store)
    try:
        group = zarr.open_group(store, mode="r")
    except (FileNotFoundError, zarr.errors.GroupNotFoundError):
        if _tile_arrays_present(store):
            return Found(None, f"its group metadata ({where}/zarr.json) is missing")
        return Found(None)
    except zarr.errors.NodeTypeValidationError:
        raise ValueError(NOT_A_STORE.format(store=where)) from None
    except OSError:
        raise  # the location cannot be read (permissions, network): not a damaged store
    except Exception as e:  # noqa: BLE001 - zarr.json that does not parse or validate
        if _tile_arrays_present(store):
            return Found(None, f"its group metadata ({where}/zarr.json) cannot be read "
                               f"({type(e).__name__}: {e})")
        raise ValueError(NOT_A_STORE.format(store=where)) from None
    try:
        names = set(group.keys())
    except Exception:  # noqa: BLE001 - a child's zarr.json does not parse: checked below
        names = {"kernel", "checksums"}
    if ATTR not in group.attrs:
        if {"kernel", "checksums"} <= names:
            return Found(None, f"its fingerprint (attribute {ATTR!r} of {where}/zarr.json) is "
                               "missing")
        if names:
            raise ValueError(NOT_A_STORE.format(store=where))
        return Found(None)
    try:
        fp = dict(check_record(group.attrs[ATTR])["fingerprint"])
    except ValueError as e:
        return Found(None, f"its fingerprint (attribute {ATTR!r} of {where}/zarr.json) is "
                           f"damaged: {e}")
    expected = _expected_arrays(fp)
    for name in ("kernel", "checksums"):
        if name not in names:
            continue  # creation was interrupted before this array: `TileStore.create` adds it
        try:
            arr = group[name]
            got = (tuple(arr.shape), tuple(arr.chunks), np.dtype(arr.dtype).name)
        except Exception as e:  # noqa: BLE001
            return Found(None, f"the metadata of its {name!r} array ({where}/{name}/zarr.json) "
                               f"cannot be read ({type(e).__name__}: {e})")
        if got != expected[name]:
            return Found(None, f"its {name!r} array has shape, chunks and dtype {got} but the "
                               f"fingerprint implies {expected[name]}")
    return Found(fp)


def _expected_arrays(fp: dict) -> dict:
    """(shape, chunks, dtype) of the two arrays of the kernel that fingerprint ``fp`` describes."""
    shape = (len(fp["groups"]), *fp["shape"])
    block = fp["block"]
    nb = (math.ceil(shape[1] / block), math.ceil(shape[2] / block))
    return {"kernel": (shape, (shape[0], block, block, *shape[3:]), fp["dtype"]),
            "checksums": (nb, (1, 1), "uint64")}


def clear(store) -> None:
    """Remove the ntkcalc nodes of a damaged store (its arrays and group metadata) so that it can
    be created again; the directory (which holds the lock) stays."""
    if _is_local(store):
        path = os.fspath(store)
        for name in ("kernel", "checksums"):
            shutil.rmtree(os.path.join(path, name), ignore_errors=True)
        with contextlib.suppress(FileNotFoundError):
            os.remove(os.path.join(path, "zarr.json"))
        return
    zarr.open_group(store, mode="w")


def checksum(parts) -> int:
    """BLAKE2b checksum (8 bytes) of the arrays' bytes; never 0, which marks "not done"."""
    h = hashlib.blake2b(digest_size=8)
    for p in parts:
        h.update(np.ascontiguousarray(p).tobytes())
    return int.from_bytes(h.digest(), "little") | 1


#: Chunks are written even when they equal the fill value (a block of zeros is still done).
WRITE_CONFIG = {"write_empty_chunks": True}


def create_arrays(store, fingerprint: dict, arrays: dict[str, dict], *, record=None):
    """Create a store's group and arrays, or complete a creation that was interrupted; never
    overwrites. ``arrays``: name -> `zarr.Group.create_array` arguments (uncompressed, written
    even when empty). The fingerprint goes first, so a run killed while creating the arrays
    resumes them; a non-empty group without ntkcalc's record is refused (`NOT_A_STORE`).
    ``record``: more entries kept beside the fingerprint (e.g. the model's O). Returns the group."""
    group = zarr.open_group(store, mode="a")
    if ATTR not in group.attrs:
        if any(True for _ in group.keys()):
            raise ValueError(NOT_A_STORE.format(store=describe(store)))
        group.attrs[ATTR] = {"fingerprint": fingerprint, "layout": LAYOUT, **(record or {})}
    for name, spec in arrays.items():
        if name not in group:
            group.create_array(name, compressors=None, config=WRITE_CONFIG, **spec)
    return group


def open_arrays(store, *names: str) -> list:
    """The named arrays of an existing store, opened for writing with `WRITE_CONFIG` (a config
    given to ``open_array`` would be ignored)."""
    group = zarr.open_group(store, mode="r+")
    return [group[name].with_config(WRITE_CONFIG) for name in names]


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
        shape = (len(plan.group_names),) + tuple(plan.shape)
        nb = (num_blocks(plan.n1, plan.block), num_blocks(plan.n2, plan.block))
        create_arrays(store, fingerprint, {
            "kernel": dict(shape=shape, chunks=(shape[0], plan.block, plan.block) + shape[3:],
                           dtype=plan.dtype, fill_value=np.nan),
            "checksums": dict(shape=nb, chunks=(1, 1), dtype="uint64", fill_value=0),
        }, record={"num_outputs": int(plan.num_outputs)})
        return cls.open(store, plan)

    @classmethod
    def open(cls, store, plan) -> TileStore:
        kernel, sums = open_arrays(store, "kernel", "checksums")
        return cls(describe(store), kernel, sums, plan.symmetric, plan.outputs)

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
        self.checksums[t.i, t.j] = np.uint64(checksum(parts))

    def done(self) -> np.ndarray:
        """The checksums (row blocks, column blocks); an entry whose chunk cannot be read is 0
        (not done), so a damaged checksum chunk costs one tile, never the run."""
        try:
            return np.asarray(self.checksums[...])
        except Exception:  # noqa: BLE001 - a truncated or garbled chunk: read entry by entry
            out = np.zeros(self.checksums.shape, dtype=np.uint64)
            for i, j in np.ndindex(*out.shape):
                with contextlib.suppress(Exception):
                    out[i, j] = self.checksums[i, j]
            return out

    def status(self, todo: list[Tile], *, verify: bool = True) -> tuple[list[Tile], int]:
        """(tiles still to compute, how many of them had a checksum but failed verification)."""
        done = self.done()
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
        return checksum(parts) == want

    def count_done(self) -> int:
        return int(np.count_nonzero(self.done()))

    def tile_bytes(self, t: Tile) -> int:
        """Bytes a tile takes on disk: its chunk (and its mirror's), its checksum, and about one
        filesystem block per file."""
        chunk = math.prod(self.kernel.chunks) * self.kernel.dtype.itemsize
        files = 2 if self.symmetric and t.i != t.j else 1
        return files * (chunk + 4096) + 8 + 4096


def record_source(store, source: dict) -> None:
    """Record which checkpoint and model produced the kernel in ``store``: the JSON-ready dict
    ``source`` goes into the group attribute ``"ntkcalc_source"`` (see `read_source`).

    Keys written by ``ntkcalc kernel``: ``checkpoint`` (absolute path), ``step`` (int or None),
    ``item``, ``subtree`` and ``model`` (the ``package.module:factory`` spec).
    """
    zarr.open_group(store, mode="r+").attrs[SOURCE_ATTR] = dict(source)


def read_source(store) -> dict | None:
    """The provenance `record_source` wrote into ``store``, or None when it records none."""
    try:
        value = zarr.open_group(store, mode="r").attrs.get(SOURCE_ATTR)
    except Exception:  # noqa: BLE001 - absent or foreign: `inspect` says which
        return None
    return dict(value) if isinstance(value, dict) else None


def read_num_outputs(store) -> int | None:
    """The model's number of outputs O recorded at creation, or None (a store from before it was
    recorded, or no store)."""
    try:
        value = zarr.open_group(store, mode="r").attrs.get(ATTR, {}).get("num_outputs")
    except Exception:  # noqa: BLE001 - absent or foreign: `inspect` says which
        return None
    return value if isinstance(value, int) and not isinstance(value, bool) and value > 0 else None


def open_verified(store, *, what: str = "store") -> tuple[TileStore, dict] | None:
    """The open store and its fingerprint after checking every tile's checksum; None when
    ``store`` holds no ntkcalc kernel.

    Raises ValueError naming ``what`` when the store's metadata is damaged or a tile is missing or
    fails its checksum (a rerun of the same ``ntk(..., store=...)`` call recomputes those).
    """
    from .blocking import tiles

    try:
        found = inspect(store)
    except ValueError:
        return None  # zarr data of another program
    where = describe(store)
    if found.damage:
        raise ValueError(f"`{what}`={where!r} is a damaged kernel store: {found.damage}. Run the "
                         "same `ntk(..., store=...)` call again to recompute it.")
    fp = found.fingerprint
    if fp is None:
        return None
    try:
        group = zarr.open_group(store, mode="r")
        ts = TileStore(where, group["kernel"], group["checksums"], fp["symmetric"],
                       fp["outputs"])
    except KeyError:
        raise ValueError(f"`{what}`={where!r} is a kernel store whose creation was interrupted: "
                         "run the same `ntk(..., store=...)` call again to finish it.") from None
    shape = fp["shape"]
    every = tiles(shape[0], shape[1], fp["block"], symmetric=fp["symmetric"])
    todo, failed = ts.status(every, verify=True)
    if todo:
        raise ValueError(
            f"`{what}`={where!r} is an incomplete or damaged kernel store: {len(todo)} of "
            f"{len(every)} tiles are missing or fail their checksum ({failed} fail it). Run the "
            "same `ntk(..., store=...)` call again to compute only those."
        )
    return ts, fp


def read_verified(store, *, what: str = "store") -> np.ndarray | None:
    """The whole kernel in ``store`` after checking every tile's checksum (`open_verified`);
    None when ``store`` holds no ntkcalc kernel.

    A store of `ntkcalc.ntk_by_layer` holds one kernel per parameter group; their sum is the whole
    kernel (the groups partition the parameters), which is what is returned.
    """
    opened = open_verified(store, what=what)
    if opened is None:
        return None
    ts = opened[0]
    return np.asarray(ts.kernel[...]).sum(axis=0, dtype=ts.kernel.dtype)
