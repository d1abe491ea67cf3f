"""Read saved parameters into a model's variables: orbax-checkpoint directories and flax msgpack.

`restore` returns the variables (linen) or the model with its state replaced (nnx); `Net` wraps
them (`Net.from_checkpoint`, `load_checkpoint` in ``net.py``), so this module never builds a Net
and the flow stays one-way: ``net.py`` → ``checkpoint.py``.

Formats, told apart by what is on disk:

- an orbax checkpoint directory (``StandardCheckpointer`` / ``PyTreeCheckpointer``; it holds
  ``_METADATA``);
- an orbax ``CheckpointManager`` directory (numbered step subdirectories; pick ``step=``, default
  the latest), or one step directory of it;
- a file of flax msgpack bytes (``flax.serialization.to_bytes``).

Pickle files are refused: unpickling runs arbitrary code from the file.

The model side is a flax linen module or an nnx model. The checkpoint tree is matched leaf by leaf
(paths ``"params/Dense_0/kernel"``) against a template: for linen the variables from
``module.init`` on an ``example`` input (shapes only, via ``jax.eval_shape``) or a ``variables``
template; for nnx the model itself, abstract (``nnx.eval_shape``) or constructed. Missing or extra
leaves and shape differences raise before any kernel is computed. A linen module with neither
``example`` nor ``variables`` takes the checkpoint tree as its variables unchecked. The saved
dtypes are kept (a float64 checkpoint stays float64 with a float32 template).
"""

from __future__ import annotations

import contextlib
import json
import logging
import os
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np

PICKLE_SUFFIXES = (".pkl", ".pickle", ".pck", ".pt", ".pth", ".joblib")

PICKLE_REFUSED = (
    "`path`={path!r} is a pickle file: loading it would run arbitrary code stored in the file, "
    "so ntkcalc refuses it. Re-save the parameters with orbax-checkpoint "
    "(ocp.StandardCheckpointer().save(dir, params)) or flax.serialization.to_bytes."
)
NOT_FOUND = "`{name}`={path!r} does not exist. Pass an existing {what}."
MISMATCH = (
    "The checkpoint at {path!r} does not match the {what}: {count} differing leaves, first "
    "{shown}:\n  {lines}\nPass the module the checkpoint was saved from (or `subtree=` to pick "
    "the part of the checkpoint that holds its variables)."
)
SHOWN = 5

PyTree = Any


# -- reading the tree from disk -------------------------------------------------------------------
def _resolve(path, name: str = "path") -> Path:
    if not isinstance(path, str | os.PathLike):
        raise TypeError(f"`{name}` must be a path (str or os.PathLike), got {type(path).__name__}.")
    p = Path(os.path.expanduser(os.fspath(path))).absolute()  # orbax wants absolute paths
    if not p.exists():
        raise FileNotFoundError(NOT_FOUND.format(name=name, path=os.fspath(path),
                                                 what="checkpoint directory or msgpack file"))
    return p


def _refuse_pickle(p: Path, head: bytes) -> None:
    # Pickle protocols 2-5 start with the PROTO opcode 0x80 and the protocol number; an empty
    # msgpack map is the single byte 0x80, so a longer file with that start is a pickle.
    proto = len(head) > 2 and head[0] == 0x80 and 2 <= head[1] <= 5
    if p.suffix.lower() in PICKLE_SUFFIXES or proto:
        raise ValueError(PICKLE_REFUSED.format(path=str(p)))


def _read_msgpack(p: Path) -> PyTree:
    from flax import serialization

    data = p.read_bytes()
    _refuse_pickle(p, data[:3])
    try:
        return serialization.msgpack_restore(data)
    except Exception as err:  # msgpack raises several unrelated types
        raise ValueError(
            f"`path`={str(p)!r} is a file but not flax msgpack bytes ({type(err).__name__}: "
            f"{err}). Pass an orbax checkpoint directory or bytes from "
            "flax.serialization.to_bytes."
        ) from None


@contextlib.contextmanager
def _quiet_orbax():
    """Hold orbax's absl-logger WARNING lines (about read-only managers and item handlers it
    infers) back while we only read: they are not about anything the user did."""
    logger = logging.getLogger("absl")
    level = logger.level
    logger.setLevel(logging.ERROR)
    try:
        yield
    finally:
        logger.setLevel(level)


@contextlib.contextmanager
def _manager(p: Path):
    import orbax.checkpoint as ocp

    with _quiet_orbax(), ocp.CheckpointManager(
            p, options=ocp.CheckpointManagerOptions(read_only=True)) as mngr:
        yield mngr


def checkpoint_steps(path) -> tuple[int, ...]:
    """The step numbers saved in an orbax ``CheckpointManager`` directory, ascending.

    Returns ``()`` for a directory holding no steps.
    """
    p = _resolve(path)
    if not p.is_dir():
        raise ValueError(
            f"`path`={os.fspath(path)!r} is a file; steps live in a CheckpointManager directory."
        )
    with _manager(p) as mngr:
        return tuple(sorted(int(s) for s in mngr.all_steps()))


def _damaged_metadata(p: Path) -> list[str]:
    """Orbax metadata files (JSON objects) at ``p`` and up to two levels below that do not parse."""
    bad = []
    for depth in ("", "*/", "*/*/"):
        for name in ("_METADATA", "_CHECKPOINT_METADATA"):
            for f in sorted(p.glob(depth + name)):
                try:
                    ok = isinstance(json.loads(f.read_text()), dict)
                except (ValueError, OSError):
                    ok = False
                if not ok:
                    bad.append(str(f))
    return bad


def _restore(p: Path, read, *args):
    """``read(*args)`` (an orbax call on the checkpoint at ``p``), with any failure of orbax
    reported as a ValueError that names the checkpoint and any damaged metadata file."""
    try:
        with _quiet_orbax():
            return read(*args)
    except Exception as err:  # noqa: BLE001 - orbax and json raise many unrelated types
        bad = _damaged_metadata(p)
        damaged = f" Damaged metadata: {', '.join(bad)}." if bad else ""
        first = str(err).strip().splitlines()[0] if str(err).strip() else ""
        raise ValueError(
            f"Could not read the orbax checkpoint at {str(p)!r}: {type(err).__name__}: "
            f"{first.rstrip('.')}.{damaged} The checkpoint is damaged or not one orbax can "
            "restore; save it again, or pass another checkpoint (or `step=`)."
        ) from err


def _pick_item(items: Mapping, item: str | None, where: str) -> PyTree:
    names = sorted(items)
    if item is None:
        if len(names) == 1:
            return items[names[0]]
        raise ValueError(
            f"{where} holds several items {names}: pass `item=` with the one that holds the "
            "model's parameters."
        )
    if item not in items:
        raise ValueError(
            f"`item`={item!r} is not in {where}, which holds {names}. Pass one of them."
        )
    return items[item]


def _read_orbax(p: Path, step: int | None, item: str | None) -> PyTree:
    import orbax.checkpoint as ocp

    if (p / "_METADATA").exists():  # one pytree checkpoint
        if step is not None:
            raise ValueError(
                f"`step`={step} was given but {str(p)!r} is a single checkpoint, not a "
                "CheckpointManager directory. Leave `step` out."
            )
        return _restore(p, ocp.StandardCheckpointer().restore, p)
    if (p / "_CHECKPOINT_METADATA").exists():  # one step directory of a manager
        items = {d.name: d for d in p.iterdir() if (d / "_METADATA").exists()}
        sub = _pick_item(items, item, f"the step directory {str(p)!r}")
        return _restore(sub, ocp.StandardCheckpointer().restore, sub)
    with _manager(p) as mngr:
        steps = sorted(int(s) for s in _restore(p, mngr.all_steps))
        if not steps:
            raise ValueError(
                f"`path`={str(p)!r} holds no orbax checkpoint (no _METADATA and no numbered step "
                "directories). Pass a checkpoint directory or a msgpack file."
            )
        if step is None:
            step = steps[-1]
        elif step not in steps:
            raise ValueError(f"`step`={step} is not saved in {str(p)!r}; saved steps: {steps}.")
        restored = _restore(p, mngr.restore, step)
    if isinstance(restored, ocp.args.Composite):
        return _pick_item(dict(restored.items()), item, f"step {step} of {str(p)!r}")
    return restored


def read_tree(path, *, step: int | None = None, item: str | None = None) -> PyTree:
    """The saved pytree at ``path`` (nested dicts of arrays), without a model to match it to."""
    p = _resolve(path)
    if p.is_dir():
        return _read_orbax(p, step, item)
    if step is not None:
        raise ValueError(f"`step`={step} was given but {str(p)!r} is a file. Leave `step` out.")
    return _read_msgpack(p)


# -- matching a tree to a template ----------------------------------------------------------------
def _key(k) -> str:
    for attr in ("key", "idx", "name"):
        if hasattr(k, attr):
            return str(getattr(k, attr))
    return str(k)


def _flat(tree: PyTree) -> dict[str, Any]:
    leaves, _ = jax.tree_util.tree_flatten_with_path(tree)
    return {"/".join(_key(k) for k in path): leaf for path, leaf in leaves}


def _subtree(tree: PyTree, subtree: str | None) -> PyTree:
    if subtree is None:
        return tree
    node = tree
    for part in subtree.strip("/").split("/"):
        if not isinstance(node, Mapping) or part not in node:
            have = sorted(map(str, node)) if isinstance(node, Mapping) else type(node).__name__
            raise ValueError(
                f"`subtree`={subtree!r}: the checkpoint has no key {part!r} there (it has "
                f"{have}). Pass a '/'-separated path of keys in the checkpoint."
            )
        node = node[part]
    return node


def _fill(template: PyTree, saved: PyTree, *, where: str, what: str, optional=None):
    """``template`` with every leaf replaced by the saved leaf at the same path.

    Saved leaves wrapped as ``{"value": leaf}`` (how orbax stores nnx variables) are unwrapped.
    ``optional`` maps template paths that may be missing from the checkpoint to their stand-in.
    """
    optional = optional or {}
    want = _flat(template)
    got = {}
    for name, leaf in _flat(saved).items():
        if name not in want and name.endswith("/value") and name[: -len("/value")] in want:
            name = name[: -len("/value")]
        got[name] = leaf
    problems = {}  # path -> line, listed in path order
    for name, leaf in want.items():
        if name not in got:
            if name not in optional:
                problems[name] = f"missing from the checkpoint: {name} {tuple(np.shape(leaf))}"
        elif tuple(np.shape(got[name])) != tuple(np.shape(leaf)):
            problems[name] = (
                f"shape differs: {name} is {tuple(np.shape(got[name]))} in the checkpoint, "
                f"{tuple(np.shape(leaf))} in the {what}"
            )
    problems.update({name: f"extra in the checkpoint: {name} {tuple(np.shape(got[name]))}"
                     for name in got if name not in want})
    problems = [problems[name] for name in sorted(problems)]
    if problems:
        raise ValueError(MISMATCH.format(
            path=where, what=what, count=len(problems), shown=min(SHOWN, len(problems)),
            lines="\n  ".join(problems[:SHOWN]),
        ))

    def pick(path, leaf):
        name = "/".join(_key(k) for k in path)
        return jnp.asarray(got[name]) if name in got else optional.get(name, leaf)

    return jax.tree_util.tree_map_with_path(pick, template)


def _concrete(leaf):
    """``leaf``, or for a ``ShapeDtypeStruct`` a stand-in: PRNG key 0, or zeros."""
    if not isinstance(leaf, jax.ShapeDtypeStruct):
        return leaf
    if jnp.issubdtype(leaf.dtype, jax.dtypes.prng_key):
        key = jax.random.key(0)
        return key if leaf.shape == () else jax.random.split(key, leaf.shape)
    return jnp.zeros(leaf.shape, leaf.dtype)


def _plain(tree: PyTree) -> dict:
    """Nested plain dicts (linen FrozenDicts and the like unfrozen)."""
    if isinstance(tree, Mapping):
        return {k: _plain(v) for k, v in tree.items()}
    return tree


def _linen(saved, where, module, example, variables, trainable, apply_kwargs) -> dict:
    saved = _plain(saved)
    if not isinstance(saved, dict):
        raise ValueError(
            f"The checkpoint at {where!r} holds a {type(saved).__name__}, not a dict of "
            "variables. Pass `subtree=` to pick the variables."
        )
    if example is not None and variables is not None:
        raise ValueError("Pass either `example` or `variables` for a linen module, not both.")
    if example is not None:
        template = jax.eval_shape(
            lambda x: module.init(jax.random.key(0), x, **apply_kwargs), jnp.asarray(example)
        )
    elif variables is not None:
        template = variables
    else:
        template = None
    if template is not None:
        template = _plain(template)
        if trainable in template and trainable not in saved:
            saved = {trainable: saved}  # a checkpoint of the trainable collection alone
        restored = _fill(template, saved, where=where, what=f"variables of {type(module).__name__}")
    else:
        restored = saved if trainable in saved else {trainable: saved}
        restored = jax.tree_util.tree_map(jnp.asarray, restored)
    return restored


def _nnx(saved, where, model):
    from flax import nnx

    graphdef, state = nnx.split(model)
    # The kernel runs the model in eval mode, so rng state is not used: a checkpoint without it
    # keeps the template's, or fresh key 0 and count 0 for an abstract template.
    optional = {name: _concrete(leaf) for name, leaf in
                _flat(nnx.to_pure_dict(nnx.state(model, nnx.RngState))).items()}
    filled = _fill(nnx.to_pure_dict(state), _plain(saved), where=where,
                   what=f"state of {type(model).__name__}", optional=optional)
    nnx.replace_by_pure_dict(state, filled)
    return nnx.merge(graphdef, state)


def restore(path, *, module, example=None, variables: PyTree = None, step: int | None = None,
            item: str | None = None, subtree: str | None = None, trainable: str = "params",
            apply_kwargs: Mapping[str, Any] | None = None):
    """The checkpoint at ``path`` matched to ``module``: see `load_checkpoint` for the arguments.

    Returns the variables dict for a linen module (the ``trainable`` collection among them), or
    the nnx model with its state replaced by the checkpoint's.
    """
    from flax import nnx

    apply_kwargs = dict(apply_kwargs or {})
    is_nnx = isinstance(module, nnx.Module)
    if is_nnx and (example is not None or variables is not None or apply_kwargs):
        raise ValueError(
            "`example`, `variables` and apply keywords are for linen modules; an nnx model "
            "is its own template. Leave them out."
        )
    if not is_nnx and not (hasattr(module, "apply") and hasattr(module, "init")):
        raise TypeError(
            f"`module` must be a flax linen Module or an nnx Module, got {type(module).__name__}."
        )
    saved = _subtree(read_tree(path, step=step, item=item), subtree)
    where = os.fspath(path)
    if is_nnx:
        return _nnx(saved, where, module)
    return _linen(saved, where, module, example, variables, trainable, apply_kwargs)
