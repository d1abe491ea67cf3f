"""Sketched NTK features against the exact kernel (float64).

References outside the sketch: the exact kernel is `ntkcalc.ntk`, itself tested against the dense
``jax.jacrev`` reference (tests/helpers.py), and the per-leaf derivatives for the variance formula
come from ``jax.jacrev`` directly. The variance formula is Isserlis' theorem for Gaussian fourth
moments applied to ``(sᵀ A u)(sᵀ B u)`` (derived in ntkcalc/_sketch/projection.py); the plain
Gaussian case ``(K_ii K_jj + K_ij²)/k`` is the usual random-projection variance (common
practice). Statistical bounds are 5-6 standard errors of the sample (common practice), so a
correct sketch fails with probability below 1e-5 per check and a biased one fails at once.
"""

from __future__ import annotations

import functools

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import ntkcalc
from tests.helpers import MLP, ZOO, f64

K_BIG = 20_000  # features per call when single features are the samples


@functools.cache
def mlp_case():
    x = np.random.default_rng(0).normal(size=(3, 4))
    module = MLP(width=6, out=3)
    net = ntkcalc.Net.from_linen(module, f64(module.init(jax.random.key(0), x[:1])))
    return net, x


@functools.cache
def plain_mlp_case():
    """`mlp_case`'s network and parameters in plain JAX, ``x @ w + b``: numpy broadcasting lowers
    each bias to broadcast_in_dim (R,) → (1, R) before the add (rank promotion allowed here)."""
    net, x = mlp_case()

    def apply(p, xx):
        with jax.numpy_rank_promotion("allow"):
            h = jax.nn.relu(xx @ p["Dense_0"]["kernel"] + p["Dense_0"]["bias"])
            h = jnp.tanh(h @ p["Dense_1"]["kernel"] + p["Dense_1"]["bias"])
            return h @ p["Dense_2"]["kernel"] + p["Dense_2"]["bias"]

    return ntkcalc.Net(apply, net.params), x


def samples(f: ntkcalc.Features, rows: int) -> np.ndarray:
    """X_m[i, j] = k φ_i[m] φ_j[m]: k independent unbiased estimates of each kernel entry."""
    phi = np.asarray(f.features) * np.sqrt(f.k)
    return phi[:, None, :] * phi[None, :, :]  # (rows, rows, k)


def rows_kernel(net, x, outputs: str) -> np.ndarray:
    """The exact kernel over the features' rows: (N, N), or (N·O, N·O) for "full"."""
    k = np.asarray(ntkcalc.ntk(net, x, outputs=outputs, progress=False))
    if outputs == "full":
        n, _, o, _ = k.shape
        k = k.transpose(0, 2, 1, 3).reshape(n * o, n * o)
    return k


def check_unbiased(f, want, *, sigmas=6.0):
    """Mean of the k per-feature estimates within ``sigmas`` standard errors (from the sample)."""
    x = samples(f, want.shape[0])
    mean, sd = x.mean(-1), x.std(-1, ddof=1)
    err = np.abs(mean - want)
    bound = sigmas * sd / np.sqrt(x.shape[-1]) + 1e-12 * np.abs(want).max()
    assert np.all(err <= bound), np.max(err / bound)


# -- the stated variance --------------------------------------------------------------------------


def block_variance(blocks_i, blocks_j, products) -> float:
    """Var(Φ_i[m] Φ_j[m]) for independent per-block projections (docs/sketch.md):
    per block A, B: ‖A‖²‖B‖² + ⟨A,B⟩² (+ 2‖AᵀB‖² + 2‖ABᵀ‖² + 2 tr((ABᵀ)²) for a product s uᵀ);
    per ordered pair of distinct blocks: ‖A_l‖²‖B_l'‖² + ⟨A_l,B_l⟩⟨A_l',B_l'⟩."""
    total = 0.0
    inner = [float(np.sum(a * b)) for a, b in zip(blocks_i, blocks_j, strict=True)]
    na = [float(np.sum(a * a)) for a in blocks_i]
    nb = [float(np.sum(b * b)) for b in blocks_j]
    for l, (a, b, prod) in enumerate(zip(blocks_i, blocks_j, products, strict=True)):
        total += na[l] * nb[l] + inner[l] ** 2
        if prod:
            abt = a @ b.T
            total += 2 * np.sum((a.T @ b) ** 2) + 2 * np.sum(abt**2) + 2 * np.trace(abt @ abt)
        for m in range(len(blocks_i)):
            if m != l:
                total += na[l] * nb[m] + inner[l] * inner[m]
    return total


def mlp_blocks(net, x, outputs):
    """Per example (and output in "full"): each Dense layer's derivative as the matrix the
    structured sketch projects: rows = inputs + 1 (the folded bias), columns = (direction, R)."""
    f = lambda p, xx: net.apply(p, xx).reshape(xx.shape[0], -1)
    jac = jax.jacrev(f)(net.params, x)
    jac = jac.get("params", jac)
    layers = sorted(jac)
    per_row = []
    for i in range(x.shape[0]):
        mats = []
        for name in layers:
            w, b = np.asarray(jac[name]["kernel"][i]), np.asarray(jac[name]["bias"][i])  # (O, C, R)
            m = np.concatenate([w, b[:, None, :]], axis=1)  # (O, C+1, R)
            if outputs == "logit-sum":
                m = m.sum(0, keepdims=True)
            mats.append(m)
        if outputs == "full":
            per_row += [[m[a] for m in mats] for a in range(mats[0].shape[0])]
        else:
            per_row.append([np.transpose(m, (1, 0, 2)).reshape(m.shape[1], -1) for m in mats])
    return per_row


@pytest.mark.parametrize(("case", "outputs"), [("linen", "trace"), ("linen", "full"),
                                               ("linen", "logit-sum"), ("plain", "trace")])
def test_structured_mean_and_variance_match_formula(case, outputs):
    # The formula's blocks are each layer's [W; b]: a bias projected with its layer's factors
    # (folded), also when plain JAX broadcasts it into the add (then the plan says so).
    net, x = mlp_case() if case == "linen" else plain_mlp_case()
    if case == "plain":
        plan = ntkcalc.plan_features(net, x, k=K_BIG, outputs=outputs)
        assert {leaf.name: leaf.projected for leaf in plan.leaves if leaf.name.endswith("bias")
                } == {f"Dense_{i}.bias": "folded" for i in range(3)}
    f = ntkcalc.ntk_features(net, x, k=K_BIG, outputs=outputs, seed=3, progress=False)
    want = rows_kernel(net, x, outputs)
    blocks = mlp_blocks(net, x, outputs)
    xs = samples(f, want.shape[0])
    n = want.shape[0]
    for i in range(n):
        for j in range(i, n):
            var = block_variance(blocks[i], blocks[j], [True] * len(blocks[i]))
            s = xs[i, j]
            # unbiased: the mean of k estimates within 5 formula standard errors
            assert abs(s.mean() - want[i, j]) <= 5 * np.sqrt(var / f.k), (i, j)
            # the variance: the sample variance within 5 of its own standard errors (from the
            # sample's fourth central moment) of the formula
            v = s.var(ddof=1)
            m4 = np.mean((s - s.mean()) ** 4)
            assert abs(v - var) <= 5 * np.sqrt((m4 - v**2) / f.k), (i, j, v, var)


@pytest.mark.parametrize("outputs", ["trace", "full"])
def test_jvp_mean_and_variance_match_formula(outputs):
    net, x = mlp_case()
    x = x[:2]
    f = ntkcalc.ntk_features(net, x, k=2000, outputs=outputs, method="jvp", seed=1,
                             progress=False)
    want = rows_kernel(net, x, outputs)
    fn = lambda p, xx: net.apply(p, xx).reshape(xx.shape[0], -1)
    jac = jax.jacrev(fn)(net.params, x)
    j = np.concatenate([np.asarray(leaf).reshape(x.shape[0], 3, -1)
                        for leaf in jax.tree_util.tree_leaves(jac)], axis=-1)  # (N, O, P)
    # trace: the product εᵀ J v over (outputs, parameters); full: a plain Gaussian tangent, whose
    # variance is the textbook (K_ii K_jj + K_ij²) (common practice)
    blocks = [[j[i]] for i in range(2)] if outputs == "trace" else [
        [j[i, a][None]] for i in range(2) for a in range(3)]
    xs = samples(f, want.shape[0])
    for i in range(want.shape[0]):
        for jj in range(i, want.shape[0]):
            var = block_variance(blocks[i], blocks[jj], [outputs == "trace"])
            if outputs == "full":
                assert np.isclose(var, want[i, i] * want[jj, jj] + want[i, jj] ** 2)
            s = xs[i, jj]
            assert abs(s.mean() - want[i, jj]) <= 5 * np.sqrt(var / f.k)
            v, m4 = s.var(ddof=1), np.mean((s - s.mean()) ** 4)
            assert abs(v - var) <= 5 * np.sqrt((m4 - v**2) / f.k), (i, jj, v, var)


def test_mean_over_seeds_converges_to_exact():
    """The mean of 40 independent sketches (seeds) of φ φᵀ is within 5 standard errors of Θ."""
    net, x = mlp_case()
    want = rows_kernel(net, x, "trace")
    blocks = mlp_blocks(net, x, "trace")
    k, seeds = 64, 40
    est = np.mean([np.asarray(f.features) @ np.asarray(f.features).T for f in (
        ntkcalc.ntk_features(net, x, k=k, seed=s, progress=False) for s in range(seeds))], axis=0)
    for i in range(3):
        for j in range(3):
            var = block_variance(blocks[i], blocks[j], [True] * 3) / (k * seeds)
            assert abs(est[i, j] - want[i, j]) <= 5 * np.sqrt(var)


@pytest.mark.parametrize("case", [c for c in ZOO if c.name not in ("mlp", "resblock-linen")],
                         ids=lambda c: c.name)
def test_every_representation_is_unbiased(case):
    """Every kind of leaf in the zoo (conv, embedding, attention's batched dot-generals, batch-norm
    state and scales, a weight used twice: factored, dense and fallback leaves; the MLP is covered
    by the variance tests, the linen residual block by the nnx one): the mean of k features'
    estimates matches Θ."""
    net = case.make()
    x = case.x(np.random.default_rng(1), 2)
    f = ntkcalc.ntk_features(net, x, k=3000, seed=5, progress=False)
    check_unbiased(f, rows_kernel(net, x, "trace"))


def test_same_seed_same_projections_across_checkpoints():
    """A linear model's Jacobian does not depend on its weights: two checkpoints with one seed
    give identical features; another seed gives different ones."""
    apply = lambda p, x: x @ p["w"]
    x = np.random.default_rng(0).normal(size=(4, 5))
    a = ntkcalc.Net(apply, {"w": np.ones((5, 2))})
    b = a.replace(params={"w": np.full((5, 2), -3.0)})
    fa = ntkcalc.ntk_features(a, x, k=32, seed=7, progress=False).features
    fb = ntkcalc.ntk_features(b, x, k=32, seed=7, progress=False).features
    fc = ntkcalc.ntk_features(a, x, k=32, seed=8, progress=False).features
    np.testing.assert_array_equal(fa, fb)
    assert not np.allclose(fa, fc)


def test_block_size_does_not_change_features():
    """Features are per example: blocks of 1, 2 or all examples give the same numbers."""
    net, x = mlp_case()
    whole = ntkcalc.ntk_features(net, x, k=16, progress=False)
    small = ntkcalc.ntk_features(net, x, k=16, progress=False, memory=whole_memory(net, x))
    assert small.block < whole.block
    np.testing.assert_allclose(small.features, whole.features, rtol=1e-12, atol=1e-14)


def whole_memory(net, x):
    """A budget that fits the projections but only a block of one or two examples."""
    from ntkcalc._sketch import features as F

    _, _, req, sketch, acts, _ = F.setup(net, x, k=16, outputs="trace", method="structured")
    fixed, result, per = F.memory_parts(sketch, acts, req, n=x.shape[0], in_memory=True)
    return int(fixed + result + 1.5 * per)


def test_float32_features_by_default():
    """Without x64 the features are float32 and still estimate the kernel (1e-2 relative at
    k = 20000, a sketch's error, not rounding)."""
    net, x = mlp_case()
    with jax.enable_x64(False):
        net32 = net.replace(params=jax.tree_util.tree_map(
            lambda a: np.asarray(a, np.float32), net.params))
        f = ntkcalc.ntk_features(net32, x.astype(np.float32), k=K_BIG, progress=False)
    assert f.features.dtype == np.float32
    check_unbiased(f, rows_kernel(net, x, "trace"))


def test_memmap_and_zarr_inputs_match_in_memory(tmp_path):
    import zarr

    net, x = mlp_case()
    path = tmp_path / "x.npy"
    np.save(path, x)
    mm = np.load(path, mmap_mode="r")
    z = zarr.create_array(tmp_path / "x.zarr", shape=x.shape, chunks=(2, 4), dtype=x.dtype)
    z[...] = x
    want = ntkcalc.ntk_features(net, x, k=16, progress=False).features
    for src in (mm, z):
        got = ntkcalc.ntk_features(net, src, k=16, progress=False).features
        np.testing.assert_array_equal(got, want)


@pytest.mark.parametrize(
    "kwargs, match",
    [
        (dict(k=0), "`k`=0"),
        (dict(k=4, outputs="diagonal"), "`outputs`='diagonal'"),
        (dict(k=4, method="jacobian"), "`method`='jacobian'"),
        (dict(k=4, seed=-1), "`seed`=-1"),
        (dict(k=4, memory=1000), "`memory`=1000"),
        (dict(k=4, store=3), "`store`=3"),
    ],
)
def test_argument_errors(kwargs, match):
    net, x = mlp_case()
    with pytest.raises((ValueError, MemoryError), match=match):
        ntkcalc.ntk_features(net, x, progress=False, **kwargs)


def test_non_finite_input_names_the_example():
    net, x = mlp_case()
    bad = x.copy()
    bad[2, 1] = np.nan
    with pytest.raises(ValueError, match="example 2"):
        ntkcalc.ntk_features(net, bad, k=4, progress=False)
