"""The compiled computation of one block's features, for each way of projecting.

``"structured"``: the engine's structured program (`ntkcalc._engine.program.Program`) gives each
leaf's per-example factors (h, g) or dense derivative for a block; `projection` turns them into
features with the leaf's seeded product projection. No network-wide Jacobian is formed and, for
factored leaves, no per-example derivative either.

``"jvp"``: for any model, feature m is ``εᵀ J_i v_m`` with a Gaussian tangent v_m over all
differentiated parameters (one JVP of the block per feature, never a Jacobian) and, in
``"trace"``, Gaussian output weights ε_m (O,); in ``"full"`` and ``"logit-sum"`` the features are
``J_ia v_m`` themselves. Cost: k forward-mode passes per example.
"""

from __future__ import annotations

import dataclasses
import functools
import math

import jax
import jax.numpy as jnp
from jax import lax

from .._engine import structured as st
from .._engine.program import Program
from . import projection as pj


@dataclasses.dataclass(frozen=True)
class Sketch:
    """Static description of one feature computation (hashable: the compile-cache key).

    Fields:
        program: the structured program (method "structured"; its ``outputs`` is "logit-sum" for
            a single direction Σ_a f_a, else "full": one direction per output).
        k: features; mix: output directions mixed into each feature ("trace", "logit-sum").
        method: "structured" or "jvp".
        leaves: each differentiated leaf's position among all the model's leaves (its key).
        jvp_chunk: features per vectorised step of the JVP path.
    """

    program: Program
    k: int
    mix: bool
    method: str
    leaves: tuple[int, ...]
    leaf_shapes: tuple[tuple[int, ...], ...]
    jvp_chunk: int = 16

    @property
    def directions(self) -> int:
        return 1 if self.program.outputs == "logit-sum" else self.program.num_outputs

    @property
    def rows_per_example(self) -> int:
        """Rows of φ per example: 1 with mixed directions, else one per direction."""
        return 1 if self.mix else self.directions

    # -- projections (structured) -------------------------------------------------------------
    def projection_shapes(self) -> list[tuple]:
        """Per differentiated leaf: ("factored", B, C, R), ("dense", shape) or None."""
        an, prog = self.program.analysis, self.program
        widths = prog.widths()
        out = []
        for k, kind in enumerate(prog.kinds):
            if kind in ("unused", "folded"):
                out.append(None)
            elif kind == "factored":
                bsz, _, _, r = st.factored_sizes(an.uses[k][0])
                out.append(("factored", bsz, widths[k], r))
            else:
                out.append(("dense", self.leaf_shapes[k]))
        return out

    def projections(self, key, dtype):
        """Every leaf's (s, u) from ``key``: a list aligned with the differentiated leaves."""
        out = []
        for leaf, spec in zip(self.leaves, self.projection_shapes(), strict=True):
            if spec is None:
                out.append(None)
                continue
            lk = pj.leaf_key(key, leaf)
            if spec[0] == "factored":
                _, bsz, width, r = spec
                out.append(pj.factored_projection(lk, k=self.k, groups=bsz, width=width,
                                                  directions=self.directions, r=r, mix=self.mix,
                                                  dtype=dtype))
            else:
                out.append(pj.dense_projection(lk, k=self.k, leaf_shape=spec[1],
                                               directions=self.directions, mix=self.mix,
                                               dtype=dtype))
        return out

    def projection_elements(self) -> int:
        """Entries of all projections (what they hold in memory)."""
        total = 0
        a = self.directions
        for spec in self.projection_shapes():
            if spec is None:
                continue
            if spec[0] == "factored":
                _, bsz, width, r = spec
                total += bsz * (width + (a * r if self.mix else r)) * self.k
            else:
                shape = spec[1]
                rows = math.prod(shape[:-1]) * (a if self.mix else 1)
                total += ((rows if rows > 1 else 0) + (shape[-1] if shape else 1)) * self.k
        return total

    # -- one block ------------------------------------------------------------------------------
    def features(self, diff, other, state, xb, proj, key):
        """(b·rows_per_example, k) features of a block xb (b, ...)."""
        if self.method == "jvp":
            phi = self._jvp_features(diff, other, state, xb, key)
        else:
            phi = self._structured_features(diff, other, state, xb, proj)
        phi = phi / jnp.sqrt(jnp.asarray(self.k, phi.dtype))
        return phi.reshape(-1, self.k)

    def _structured_features(self, diff, other, state, xb, proj):
        reps = self.program.factors(diff, other, state, xb)
        total = None
        for rep, kind, p in zip(reps, self.program.kinds, proj, strict=True):
            if kind in ("unused", "folded"):
                continue
            if kind == "factored":
                part = pj.project_factored(rep[0], rep[1], p[0], p[1], mix=self.mix)
            else:
                part = pj.project_dense(rep, p[0], p[1], mix=self.mix)
            total = part if total is None else total + part
        if total is None:  # no parameter affects the outputs
            dtype = jax.tree_util.tree_leaves(diff)[0].dtype
            total = jnp.zeros((xb.shape[0], self.rows_per_example, self.k), dtype)
        return total

    def _jvp_features(self, diff, other, state, xb, key):
        prog = self.program
        logit_sum = prog.outputs == "logit-sum"

        def f(d):
            out = jax.vmap(prog.example_fn, in_axes=(None, None, None, 0))(d, other, state, xb)
            return out.sum(-1, keepdims=True) if logit_sum else out  # (b, A)

        tangents, weights = jax.random.fold_in(key, 0), jax.random.fold_in(key, 1)

        def one(m):
            v = pj.tangent(tangents, diff, m, self.leaves)
            col = jax.jvp(f, (list(diff),), (v,))[1]  # (b, A)
            if self.mix and not logit_sum:
                eps = jax.random.normal(jax.random.fold_in(weights, m), (col.shape[1],),
                                        col.dtype)
                col = jnp.sum(col * eps[None, :], axis=1, keepdims=True)
            return col

        cols = lax.map(one, jnp.arange(self.k), batch_size=min(self.jvp_chunk, self.k))
        return jnp.transpose(cols, (1, 2, 0))  # (b, rows, k)


@functools.lru_cache(maxsize=64)
def compiled(sketch: Sketch):
    """(jitted projections(key, dtype), jitted block features), cached per `Sketch`."""
    gen = jax.jit(sketch.projections, static_argnums=1)
    return gen, jax.jit(sketch.features)
