"""The empirical NTK as a matrix-free operator, for kernels too large to store.

For a network f(θ, x) with Jacobian ``J = ∂f/∂θ`` over the N examples, the kernel is
``Θ = J Jᵀ`` (Jacot, Gabriel & Hongler, NeurIPS 2018, arXiv:1806.07572). Its product with a
vector needs no kernel entries: ``Θ v = J (Jᵀ v)``, one vector-Jacobian product (reverse mode,
``jax.vjp``) and one Jacobian-vector product (forward mode, ``jax.jvp``), accumulated over the
data in batches. Memory is one parameter-sized vector per probe, never N².
"""

from __future__ import annotations

import functools
import math
import warnings
from typing import Literal

import jax
import jax.numpy as jnp
import numpy as np
import scipy.sparse.linalg as spla

from . import _checks
from ._batches import batch_slices, pad_rows

Outputs = Literal["trace", "full", "logit-sum"]


def _lift(v_b: jnp.ndarray, mode: str, n_out: int) -> jnp.ndarray:
    """Cotangent probes (S, B, O) for a batch of the input block ``v_b``."""
    if mode == "full":  # v_b: (B, O, k) -> (k, B, O)
        return jnp.moveaxis(v_b, -1, 0)
    # v_b: (B, k)
    if mode == "logit-sum":
        return jnp.broadcast_to(v_b.T[:, :, None], (v_b.shape[1], v_b.shape[0], n_out))
    eye = jnp.eye(n_out, dtype=v_b.dtype)  # trace: probe (a, c) = v_c ⊗ e_a
    probes = v_b.T[None, :, :, None] * eye[:, None, None, :]  # (O, k, B, O)
    return probes.reshape(n_out * v_b.shape[1], v_b.shape[0], n_out)


def _lower(outs: jnp.ndarray, mode: str, n_out: int) -> jnp.ndarray:
    """The result block from the JVP outputs (S, B, O) of the probes."""
    if mode == "full":
        return jnp.moveaxis(outs, 0, -1)  # (B, O, k)
    if mode == "logit-sum":
        return jnp.sum(outs, axis=-1).T  # (B, k)
    s, b, _ = outs.shape
    per = outs.reshape(n_out, s // n_out, b, n_out)
    return jnp.einsum("akba->bk", per)  # Σ_a of output a's own column


@functools.lru_cache(maxsize=64)
def _compiled(call, mode: str, n_out: int, work):
    """Jitted batch VJP ("pull") and JVP ("push") for one ``net.call``: Nets sharing ``call``
    (e.g. a checkpoint via ``net.replace(params=...)``) and every operator over them share these
    compiled functions."""

    def flat(params, state, xb):
        return call(params, state, xb).reshape(xb.shape[0], -1)

    @jax.jit
    def pull(params, state, xb, v_b):
        _, pullback = jax.vjp(lambda p: flat(p, state, xb), params)
        return jax.vmap(lambda c: pullback(c)[0])(_lift(v_b.astype(work), mode, n_out))

    @jax.jit
    def push(params, state, xb, tangents):
        def one(t):
            return jax.jvp(lambda p: flat(p, state, xb), (params,), (t,))[1]

        return _lower(jax.vmap(one)(tangents), mode, n_out)

    return pull, push


class NTKOperator(spla.LinearOperator):
    """Matrix-free empirical NTK of a `Net` over fixed inputs; see `ntk_operator`.

    Attributes: ``net``, ``num_examples`` (N), ``num_outputs`` (O), ``outputs`` (the mode),
    ``batch``, ``matvecs`` (vectors applied so far).
    """

    def __init__(self, net, x, *, outputs: Outputs, batch: int):
        out = jax.eval_shape(net.call, net.params, net.state, x[:1])
        if out.dtype != np.float64:
            warnings.warn(
                f"`net` computes in {out.dtype}: kernel products carry about "
                f"{float(np.finfo(out.dtype).eps):.0e} relative rounding error, so Lanczos, CG "
                "and trace estimates are accurate to that level at best. Use float64 parameters "
                "with jax_enable_x64 for reference-quality results.",
                RuntimeWarning,
                stacklevel=3,
            )
        self.net, self.x, self.outputs, self.batch = net, x, outputs, min(batch, x.shape[0])
        self.num_examples = int(x.shape[0])
        self.num_outputs = int(math.prod(out.shape[1:]))
        size = self.num_examples * (self.num_outputs if outputs == "full" else 1)
        super().__init__(dtype=np.dtype(np.float64), shape=(size, size))
        self.matvecs = 0
        self._pull, self._push = _compiled(net.call, outputs, self.num_outputs, out.dtype)

    def _blocks(self, v: np.ndarray) -> np.ndarray:
        """``v`` (size, k) as per-example rows: (N, O, k) for "full", else (N, k)."""
        if self.outputs == "full":
            return v.reshape(self.num_examples, self.num_outputs, -1)
        return v.reshape(self.num_examples, -1)

    def _matmat(self, v):
        v = np.asarray(v, dtype=self.dtype)
        k = v.shape[1]
        self.matvecs += k
        blocks = self._blocks(v)
        params, state = self.net.params, self.net.state
        grads = None
        for start, stop in batch_slices(self.num_examples, self.batch):
            v_b = np.zeros((self.batch, *blocks.shape[1:]))
            v_b[: stop - start] = blocks[start:stop]  # padded rows get a zero cotangent
            g = self._pull(params, state, pad_rows(self.x[start:stop], self.batch), v_b)
            grads = g if grads is None else jax.tree_util.tree_map(jnp.add, grads, g)
        out = np.empty(blocks.shape)
        for start, stop in batch_slices(self.num_examples, self.batch):
            res = self._push(params, state, pad_rows(self.x[start:stop], self.batch), grads)
            out[start:stop] = np.asarray(res)[: stop - start]
        return out.reshape(v.shape[0], k)

    def _matvec(self, v):
        return self._matmat(np.asarray(v).reshape(-1, 1)).ravel()

    def _rmatvec(self, v):
        return self._matvec(v)

    def _adjoint(self):
        return self

    def __repr__(self) -> str:
        return (
            f"NTKOperator({self.outputs}, shape={self.shape}, N={self.num_examples}, "
            f"O={self.num_outputs}, batch={self.batch}, matvecs={self.matvecs})"
        )


def ntk_operator(net, x, *, outputs: Outputs = "trace", batch: int = 256) -> NTKOperator:
    """The empirical NTK of ``net`` on inputs ``x`` as a ``scipy.sparse.linalg.LinearOperator``.

    Modes (J_a is the (N, P) Jacobian of output a; outputs with extra axes are flattened to O):

    - "trace": ``Σ_a J_a J_aᵀ``, (N, N): the kernel summed over the output diagonal. A matvec
      probes each output with ``v ⊗ e_a`` (O VJPs and O JVPs per vector, vmapped).
    - "full": ``J Jᵀ`` over (example, output) pairs, (N·O, N·O), row index ``i·O + a``; one VJP
      and one JVP per vector.
    - "logit-sum": ``(Σ_a J_a)(Σ_a J_a)ᵀ``, (N, N): the kernel of the summed outputs.

    Each product runs over the data in batches of ``batch`` examples (the last batch padded with
    zero cotangents, so each batch shape compiles once). It computes in the network's own dtype:
    float64 with ``jax_enable_x64`` and float64 parameters; with float32 it warns, since products
    then carry ~1e-7 relative error and so will Lanczos, CG and Hutch++ results built on them.
    The operator's scipy dtype is always float64. ``matmat`` with k columns vmaps over them:
    memory is about ``k·P`` parameter values (``k·O·P`` for "trace").

    Args:
        net: an `ntkcalc.Net` (``net.call(params, state, x)``, differentiated in ``net.params``).
        x: (N, ...) inputs as an array, batch on axis 0.
        outputs: "trace", "full" or "logit-sum".
        batch: examples per batch.

    Returns:
        `NTKOperator` (a square, symmetric LinearOperator) with a ``matvecs`` counter.
    """
    if outputs not in ("trace", "full", "logit-sum"):
        raise ValueError(
            f"`outputs` must be 'trace', 'full' or 'logit-sum', got {outputs!r}."
        )
    if not hasattr(net, "call") or not hasattr(net, "params"):
        raise TypeError(
            f"`net` must be an ntkcalc Net (with .call, .params, .state), got "
            f"{type(net).__name__}. Wrap a function with Net(apply, params)."
        )
    batch = _checks.positive_int("batch", batch)
    x = _checks.examples("x", x)
    return NTKOperator(net, x, outputs=outputs, batch=batch)
