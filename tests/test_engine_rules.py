"""Each structured rule as a unit: its registry entry, forward FLOPs, factor sizes, local VJP
FLOPs and factors, on small hand-sized uses; and the per-step cost of scans in the plan.

FLOP counts: a matmul (m, k) @ (k, n) is 2·m·n·k FLOPs, a convolution output is a dot product
over its patch (2 FLOPs per window entry and input channel), an elementwise op one FLOP per
output element (common practice). The factors (h, g) of a linear consumer are checked against
its derivative by direct differentiation (jax.jacrev, float64): ∂f_a/∂W = Σ_t h_t ⊗ g_{a,t}
(Novak, Sohl-Dickstein & Schoenholz, "Fast Finite Width Neural Tangent Kernel", ICML 2022,
arXiv:2206.08720).
"""

from __future__ import annotations

import dataclasses

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from jax import lax

import ntkcalc
from ntkcalc._engine import cost as C
from ntkcalc._engine import rules
from ntkcalc._engine import structured as st

CONV_DN = ("NHWC", "HWIO", "NHWC")


def _uses(f, *args, num_diff=1):
    """The analysis of f(*args) with its first ``num_diff`` arguments as the leaves."""
    closed = jax.make_jaxpr(f)(*args)
    return st.analyze(closed, num_diff)


def _only_use(f, *args):
    an = _uses(f, *args)
    assert an.fallback[0] is None, an.fallback[0]
    (u,) = an.uses[0]
    return u


def _conv(x, w, groups=1):
    return lax.conv_general_dilated(x, w, (1, 1), "VALID", dimension_numbers=CONV_DN,
                                    feature_group_count=groups)


def test_registry_is_keyed_by_primitive():
    names = {prim: rule.name for prim, rule in rules.RULES.items()}
    assert names == {"dot_general": "dot", "conv_general_dilated": "conv", "gather": "embed",
                     "mul": "scale", "add": "bias", "sub": "bias", "concatenate": "concat"}
    assert {r.name for r in rules.RULES.values() if r.factorable} == {"dot", "conv", "embed"}


def test_dot_sizes_and_flops():
    w, x = jnp.ones((4, 5)), jnp.ones((3, 4))  # 3 positions, 4 inputs, 5 outputs
    u = _only_use(lambda w, x: jnp.tanh(x @ w), w, x)
    assert u.rule is rules.RULES["dot_general"] and u.operand == 1
    assert u.rule.step_sizes(u) == (1, 3, 4, 5)
    assert st.factored_sizes(u) == (1, 3, 4, 5)
    assert u.rule.forward_flops(u.params, u.in_avals, u.out_aval) == 2 * 3 * 5 * 4
    assert u.rule.local_flops(u) == 2 * 3 * 5 * 4
    assert u.rule.bias_shape(u) == (1, 5)
    # Batch dims (separate weights per batch index) and the leaf as the lhs.
    wb, xb = jnp.ones((2, 4, 5)), jnp.ones((2, 5, 3))
    ub = _only_use(lambda w, x: jnp.einsum("bij,bjk->bik", w, x), wb, xb)
    assert ub.operand == 0 and ub.rule.step_sizes(ub) == (2, 3, 5, 4)
    assert ub.rule.forward_flops(ub.params, ub.in_avals, ub.out_aval) == 2 * 2 * 4 * 3 * 5
    assert ub.rule.bias_shape(ub) is None  # only a rhs weight without batch dims carries one


def test_bias_folds_through_a_broadcast_that_only_inserts_unit_dims():
    # y = x W + b with b (5,) broadcast to (1, 5) keeps every entry of b once: it folds into W's
    # factors. Broadcast to more entries (a (1, 1) bias shared by all 5 outputs), its inner
    # products change, so it stays a leaf of its own (common practice: a replicated entry's
    # derivative is the sum over its copies).
    x, w = jnp.ones((1, 4)), jnp.ones((4, 5))
    an = _uses(lambda w, b, x: x @ w + lax.broadcast_in_dim(b, (1, 5), (1,)), w, jnp.ones(5), x,
               num_diff=2)
    assert an.uses[1][0].permuting and an.bias_of == (1, None)
    shared = _uses(lambda w, b, x: x @ w + jnp.broadcast_to(b, (1, 5)), w, jnp.ones((1, 1)), x,
                   num_diff=2)
    assert not shared.uses[1][0].permuting and shared.bias_of == (None, None)


def test_conv_sizes_and_flops():
    x = jnp.ones((1, 6, 6, 2))
    u = _only_use(lambda w, x: _conv(x, w), jnp.ones((3, 3, 2, 4)), x)  # output (1, 4, 4, 4)
    assert u.rule.name == "conv" and u.rule.step_sizes(u) == (1, 16, 18, 4)
    assert u.rule.forward_flops(u.params, u.in_avals, u.out_aval) == 2 * 64 * 18
    ug = _only_use(lambda w, x: _conv(x, w, 2), jnp.ones((3, 3, 1, 4)), x)
    assert ug.rule.step_sizes(ug) == (2, 16, 9, 2)  # groups are batch dims
    assert ug.rule.local_flops(ug) == 2 * 64 * 9
    # A bias folds as one more patch entry: ones but the output features, in either layout.
    assert u.rule.bias_shape(u) == (1, 1, 1, 4) and ug.rule.bias_shape(ug) == (1, 1, 1, 4)
    un = _only_use(lambda w, x: lax.conv_general_dilated(
        x, w, (1, 1), "VALID", dimension_numbers=("NCHW", "OIHW", "NCHW")),
        jnp.ones((4, 2, 3, 3)), jnp.ones((1, 2, 6, 6)))
    assert un.rule.bias_shape(un) == (1, 4, 1, 1)
    # The kernel as the lhs (an image-shaped parameter) has no conv rule: it falls back.
    an = _uses(lambda x, w: _conv(x, w), x, jnp.ones((3, 3, 2, 4)))
    assert an.rule(0) == "fallback" and an.uses[0] == ()


def test_embed_sizes_and_dense_inputs():
    table, idx = jnp.ones((7, 3)), jnp.array([0, 2, 6, 2, 1])
    u = _only_use(lambda e, i: jnp.tanh(jnp.take(e, i, axis=0)), table, idx)
    assert u.rule.name == "embed" and u.rule.step_sizes(u) == (1, 5, 7, 3)
    assert u.rule.input_gram_width(7) == 0 and u.rule.stored_inputs(7) == 1
    onehot = u.rule.dense_inputs(jnp.array([[0, 6, -1]]), u, jnp.float64)
    np.testing.assert_array_equal(onehot[0], np.eye(7)[[0, 6]].tolist() + [[0.0] * 7])
    # A gather that is not a whole-row lookup has no rule (never another rule's branch).
    an = _uses(lambda e, i: jnp.tanh(e[i, 1]), table, idx)
    assert an.rule(0) == "fallback"


def test_elementwise_rules_and_unknown_primitives():
    h = jnp.ones((3, 4))
    us = _uses(lambda g, b, c, h: jnp.concatenate([c[None], h * g[None] - b[None]]), jnp.ones(4),
               jnp.ones(4), jnp.ones(4), h, num_diff=3)
    assert [us.rule(k) for k in range(3)] == ["scale", "bias", "concat"]
    (u,) = us.uses[0]
    assert not u.rule.factorable and u.rule.local_flops(u) == 12  # one per output element
    with pytest.raises(TypeError, match="does not factor"):
        u.rule.step_sizes(u)
    assert _uses(lambda w, h: jnp.sin(h @ w), jnp.ones((4, 2)), h).rule(0) == "dot"
    assert _uses(lambda w, h: h @ jnp.sin(w), jnp.ones((4, 2)), h).rule(0) == "fallback"


def test_forward_cost_sums_rule_flops():
    def f(w, v, x):
        return jnp.tanh(x @ w) @ v  # (3, 4) @ (4, 5), tanh, (3, 5) @ (5, 2)

    closed = jax.make_jaxpr(f)(jnp.ones((4, 5)), jnp.ones((5, 2)), jnp.ones((3, 4)))
    flops, acts = C.forward_cost(closed)
    assert flops == 2 * 3 * 5 * 4 + 15 + 2 * 3 * 2 * 5
    assert acts == 15 + 15 + 6


@pytest.mark.parametrize("lhs", [False, True])
def test_dot_factors_give_the_derivative(lhs):
    r = np.random.default_rng(0)
    w, x = r.normal(size=(4, 5)), r.normal(size=(3, 4))
    consumer = (lambda w, x: w.T @ x.T) if lhs else (lambda w, x: x @ w)
    u = _only_use(consumer, w, x)
    y = consumer(w, x)
    cot = jnp.asarray(r.normal(size=(2, *y.shape)))  # two output directions
    ops = [w, x.T] if lhs else [x, w]
    h, g = rules.RULES["dot_general"].factors(u, ops, cot)
    want = jnp.einsum("ay...,y...w->aw", cot.reshape(2, -1),
                      jax.jacrev(lambda w: consumer(w, x).reshape(-1))(w).reshape(-1, 20))
    got = jnp.einsum("btc,abtr->abcr", h, g).reshape(2, -1)  # Σ_t h_t ⊗ g_t, (C, R) = W's order
    np.testing.assert_allclose(got, want.reshape(2, -1), rtol=1e-12)


def test_conv_and_embed_factors_give_the_derivative():
    r = np.random.default_rng(1)
    x, w = r.normal(size=(1, 5, 5, 2)), r.normal(size=(2, 2, 2, 3))
    u = _only_use(lambda w, x: _conv(x, w), w, x)
    cot = jnp.asarray(r.normal(size=(2, 1, 4, 4, 3)))
    h, g = u.rule.factors(u, [x, w], cot)
    jac = jax.jacrev(lambda w: _conv(x, w))(w)  # (1, 4, 4, 3, 2, 2, 2, 3)
    want = jnp.einsum("anhwo,nhwoijcp->aijcp", cot, jac)
    # Patch features are (in-channel, window) flattened: C = (c, i, j).
    got = jnp.einsum("btc,abtr->abcr", h, g).reshape(2, 2, 2, 2, 3)  # (a, c, i, j, o)
    np.testing.assert_allclose(got, jnp.transpose(want, (0, 3, 1, 2, 4)), rtol=1e-12)
    table, idx = r.normal(size=(7, 3)), jnp.array([0, 2, 6, 2])
    ue = _only_use(lambda e, i: jnp.take(e, i, axis=0), table, idx)
    cot = jnp.asarray(r.normal(size=(2, 4, 3)))
    h, g = ue.rule.factors(ue, [table, idx[:, None]], cot)
    got = jnp.einsum("btc,abtr->acr", ue.rule.dense_inputs(h, ue, g.dtype), g)
    jac = jax.jacrev(lambda e: jnp.take(e, idx, axis=0))(table)
    np.testing.assert_allclose(got, jnp.einsum("atr,trvs->avs", cot, jac), rtol=1e-12)


def _rnn(steps):
    """A tanh RNN over ``steps`` inputs of 2 features: w_in, w_rec closed over by the scan (loop
    constants), v outside it; 2 outputs."""
    r = np.random.default_rng(4)
    params = {"w_in": r.normal(size=(2, 3)), "w_rec": r.normal(size=(3, 3)) / 3,
              "v": r.normal(size=(3, 2))}

    def apply(p, xs):  # xs (batch, steps, 2)
        def step(h, x_t):
            h = jnp.tanh(x_t @ p["w_in"] + h @ p["w_rec"])
            return h, None

        h, _ = lax.scan(step, jnp.zeros((xs.shape[0], 3), xs.dtype), jnp.swapaxes(xs, 0, 1))
        return h @ p["v"]

    return ntkcalc.Net(apply, params), r.normal(size=(4, steps, 2))


@pytest.mark.parametrize("steps", [3, 6])
def test_scan_accumulation_is_in_the_jacobian_estimate(monkeypatch, steps):
    # The network's reverse pass adds the cotangent of w_in (6 entries) and w_rec (9) into an
    # accumulator at each of the S steps, for each of the A = 2 directions of each of the 4
    # examples (factors cached: one evaluation per example): 4·2·S·15 entries at the measured
    # scan accumulation rate (`Rates.accumulation`). Changing that rate moves the jacobian
    # estimate by exactly this.
    net, x = _rnn(steps)
    entries = 4 * 2 * steps * (6 + 9)
    base = ntkcalc.Rates(matmul=1e9, stream=1e9, formation=((1, 1e9),), call=0.0,
                         accumulation=1e9)

    def estimate(acc_rate):
        rates = dataclasses.replace(base, accumulation=acc_rate)
        p = ntkcalc.plan(net, x, outputs="full", method="jacobian", rates=rates)
        assert p.cache_factors
        return p.seconds

    slow, fast = estimate(1e6), estimate(2e6)
    np.testing.assert_allclose(slow - fast, entries * (1 / 1e6 - 1 / 2e6), rtol=1e-9)
    uses = ntkcalc.plan(net, x, outputs="full", method="structured").program.analysis.uses
    # Leaves in tree order: v, w_in, w_rec.
    assert [st.loop_accumulation(us, n) for us, n in zip(uses, (6, 6, 9), strict=True)] == [
        0, 6 * steps, 9 * steps]


def test_scan_accumulation_rate_is_measured():
    rate = C.scan_accumulation_rate("float64")
    assert np.isfinite(rate) and rate > 1e6  # entries/s: any machine accumulates over 10⁶/s


def test_streamed_estimate_counts_the_padded_chunk(monkeypatch):
    # y = Σ_t (x_t W + b), W 64×2 with its bias folded: 65 input features. Streamed chunks are
    # whole multiples of the chunk width, so in chunks of 64 the dense derivative is formed for
    # 128 features, in one chunk of 65 for 65. With the streaming rate made tiny (dense storage
    # and factored Grams priced out) the leaf is streamed, and its estimate moves by the padded
    # formation: 2·A·T·(C + 1)·R matmul FLOPs per example (common practice), times 63/65, re-formed
    # in each tile (2/side per pair).
    from ntkcalc._engine import planner
    from ntkcalc._tiles import plan as planning

    r = np.random.default_rng(2)
    params = {"w": r.normal(size=(64, 2)), "b": r.normal(size=(2,))}
    net = ntkcalc.Net(lambda p, x: (x @ p["w"] + p["b"].reshape(1, 1, 2)).sum(1), params)
    x = r.normal(size=(4, 16, 64))  # 16 positions: the factored Grams outweigh the derivative
    rates = ntkcalc.Rates(matmul=1e9, stream=1.0, formation=((1, 1e9),), call=0.0,
                          accumulation=1e9)

    def row(chunk):
        monkeypatch.setattr(planner, "stream_chunk", lambda *_: chunk)
        planning._PLANS.clear()  # a kept plan of the same request was priced with other chunks
        leaves = {leaf.name: leaf for leaf in ntkcalc.plan(net, x, method="structured",
                                                           rates=rates).leaves}
        assert (leaves["w"].representation, leaves["b"].representation) == ("streamed", "folded")
        return leaves["w"].flops

    pairs, side, form = 4 * 5 / 2, 4, C.formation_flops(2, 1, 16, 65, 2)
    np.testing.assert_allclose(row(64) - row(65), pairs * form * (128 / 65 - 1) * 2 / side,
                               rtol=1e-12)
