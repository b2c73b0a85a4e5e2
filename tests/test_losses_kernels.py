"""Losses and numba kernels against references outside the project (each check names its source)."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.optimize
from scipy.special import expit, log_expit, poch
from sklearn.metrics import log_loss

from conftest import batch_csr
from trainer.errors import UserError
from trainer.kernels import (batch_support, blend_into, margins_into, objectives_into, predict_margin,
                             regularized_gradient, residuals_curvatures_into, residuals_into, scatter_compact,
                             scatter_gradient_curvature)
from trainer.losses import dloss, loss as loss_fn, loss_dloss
from trainer.losses import expit as project_expit, loss_code, pointwise_curvature, pointwise_derivative, pointwise_loss
from trainer.model import LOSSES
from trainer.reader import Batch
from trainer.solvers._olbfgs_kernels import (CHUNK, chunk_pointers, combine_pass, fold_diagonal, lbfgs_direction,
                                             line_loss, line_residuals, sparse_dot)


def _batch(rng, rows=60, n=17, nnz=5):
    """A random weighted CSR batch; row 0 holds one bucket twice (collisions stay separate entries)."""
    indices = rng.integers(0, n, rows * nnz).astype(np.int32)
    indices[1] = indices[0]
    data = rng.normal(size=rows * nnz)
    indptr = np.arange(rows + 1, dtype=np.int64) * nnz
    labels = (rng.random(rows) < 0.4).astype(np.float64)
    weights = rng.uniform(0.2, 3.0, rows)
    return Batch(indptr, indices, data, labels, weights, rows)


def _objective(loss, batch, n, lam):
    """F(x) and its gradient through the project's kernels, x = (w, b)."""
    code = loss_code(loss)
    bits = np.zeros((n + 63) // 64, dtype=np.uint64)
    slot = np.empty(batch.indices.shape[0], dtype=np.int32)
    cols = batch_support(batch.indices, bits, slot)

    def f(x):
        z = np.empty(batch.n_rows)
        margins_into(batch.indptr, batch.indices, batch.data, x[:n], x[n], z)
        r = np.empty(batch.n_rows)
        loss_sum, weight_sum, _ = residuals_into(code, batch.labels, batch.weights, z, r)
        return loss_sum / weight_sum + 0.5 * lam * x[:n] @ x[:n]

    def grad(x):
        z = np.empty(batch.n_rows)
        margins_into(batch.indptr, batch.indices, batch.data, x[:n], x[n], z)
        r = np.empty(batch.n_rows)
        _, weight_sum, r_sum = residuals_into(code, batch.labels, batch.weights, z, r)
        gsp = np.empty(cols.shape[0])
        scatter_compact(batch.indptr, slot, batch.data, r, 1.0 / weight_sum, gsp)
        out = np.empty(n + 1)
        regularized_gradient(x[:n], lam, cols, gsp, r_sum / weight_sum, out)
        return out

    return f, grad


def test_logistic_loss_matches_sklearn_log_loss():
    rng = np.random.default_rng(0)
    z = rng.normal(scale=4.0, size=500)
    y = (rng.random(500) < 0.3).astype(float)
    c = rng.uniform(0.1, 2.0, 500)
    mine = np.average(pointwise_loss("logistic", y, z), weights=c)
    # reference: sklearn.metrics.log_loss on p = expit(z) with the same sample weights
    ref = log_loss(y, expit(z), sample_weight=c, labels=[0, 1])
    assert mine == pytest.approx(ref, rel=1e-12)


def test_squared_hinge_matches_textbook_formula():
    rng = np.random.default_rng(1)
    z = rng.normal(scale=2.0, size=400)
    y = (rng.random(400) < 0.5).astype(float)
    s = 2 * y - 1
    # reference: the L2-SVM loss max(0, 1 - s z)^2 ("A Dual Coordinate Descent Method for Large-scale
    # Linear SVM", ICML 2008), evaluated with numpy
    np.testing.assert_allclose(pointwise_loss("squared-hinge", y, z), np.maximum(0.0, 1.0 - s * z) ** 2,
                               rtol=1e-15, atol=0)


@pytest.mark.parametrize("loss", LOSSES)
def test_derivatives_match_central_differences(loss):
    rng = np.random.default_rng(2)
    z = rng.normal(scale=3.0, size=300)
    y = (rng.random(300) < 0.5).astype(float)
    away_from_kink = np.abs(1.0 - (2 * y - 1) * z) > 1e-3  # the squared hinge's l'' jumps at s z = 1
    z, y = z[away_from_kink], y[away_from_kink]
    h = 1e-6
    # reference: central differences (f(z+h) - f(z-h)) / 2h, truncation error O(h^2)
    fd1 = (pointwise_loss(loss, y, z + h) - pointwise_loss(loss, y, z - h)) / (2 * h)
    np.testing.assert_allclose(pointwise_derivative(loss, y, z), fd1, rtol=1e-6, atol=1e-8)
    fd2 = (pointwise_derivative(loss, y, z + h) - pointwise_derivative(loss, y, z - h)) / (2 * h)
    np.testing.assert_allclose(pointwise_curvature(loss, y, z), fd2, rtol=1e-5, atol=1e-8)


def test_extreme_margins_are_finite_and_accurate():
    z = np.array([-1e4, -800.0, -40.0, -1.0, 0.0, 1.0, 40.0, 800.0, 1e4] * 2)
    y = np.repeat([1.0, 0.0], 9)
    s = 2 * y - 1
    for loss in LOSSES:
        for fn in (pointwise_loss, pointwise_derivative, pointwise_curvature):
            assert np.isfinite(fn(loss, y, z)).all()
    # reference: scipy.special.log_expit / expit, which are accurate in both tails
    np.testing.assert_allclose(pointwise_loss("logistic", y, z), -log_expit(s * z), rtol=1e-14, atol=0)
    np.testing.assert_allclose(pointwise_derivative("logistic", y, z), -s * expit(-s * z), rtol=1e-14, atol=0)
    np.testing.assert_allclose(pointwise_curvature("logistic", y, z), expit(z) * expit(-z),
                               rtol=1e-13, atol=0)
    # at z = -1e4 with y = 1 the loss is 1e4 + log1p(exp(-1e4)) = 1e4 exactly in float64 (from memory:
    # log(1 + e^m) = m + log1p(e^-m))
    assert pointwise_loss("logistic", [1.0], [-1e4])[0] == 1e4
    # textbook formula: (1 + 1e4)^2
    assert pointwise_loss("squared-hinge", [1.0], [-1e4])[0] == (1.0 + 1e4) ** 2


def test_expit_equals_scipy_bit_for_bit():
    # reference: scipy.special.expit, 1 / (1 + exp(-z)) in scipy's xsf library; the project's kernel
    # replaces it (one import less at start-up) and must give the same doubles, extremes included
    rng = np.random.default_rng(5)
    z = np.concatenate([rng.normal(0.0, s, 20_000) for s in (1.0, 30.0, 400.0)]
                       + [np.array([0.0, -0.0, 1e-300, 36.7, -36.7, 709.8, -709.8, 745.2, -745.2, np.inf, -np.inf])])
    assert np.array_equal(project_expit(z).view(np.int64), expit(z).view(np.int64))
    grid = z[:12].reshape(3, 4)[:, ::2]  # any shape and stride, as scipy takes it
    assert np.array_equal(project_expit(grid), expit(grid))
    assert np.isnan(project_expit(np.array([np.nan]))[0])


def test_unknown_loss_is_a_user_error():
    with pytest.raises(UserError, match="--loss"):
        pointwise_loss("hinge", [1.0], [0.0])


def test_predict_margin_matches_scipy_sparse():
    rng = np.random.default_rng(3)
    batch = _batch(rng)
    w = rng.normal(size=17)
    # reference: scipy.sparse CSR product X w + b
    np.testing.assert_allclose(predict_margin(batch, w, 0.7), batch_csr(batch, 17) @ w + 0.7,
                               rtol=1e-13, atol=1e-13)


@pytest.mark.parametrize("loss", LOSSES)
def test_objective_gradient_matches_finite_differences(loss):
    rng = np.random.default_rng(4)
    n, lam = 17, 0.03
    batch = _batch(rng, n=n)
    f, grad = _objective(loss, batch, n, lam)
    for _ in range(3):
        x = rng.normal(scale=0.5, size=n + 1)
        # reference: scipy.optimize.check_grad (forward differences, step 1.49e-8)
        err = scipy.optimize.check_grad(f, grad, x)
        assert err < 1e-6 * max(1.0, np.linalg.norm(grad(x)))


@pytest.mark.parametrize("loss", LOSSES)
def test_gradient_and_gauss_newton_diagonal_match_dense_products(loss):
    rng = np.random.default_rng(45)
    n = 17
    batch = _batch(rng, n=n)
    z = rng.normal(size=batch.n_rows)
    code = loss_code(loss)
    r, h = np.empty(batch.n_rows), np.empty(batch.n_rows)
    sums = residuals_curvatures_into(code, batch.labels, batch.weights, z, r, h)
    c, y = batch.weights, batch.labels
    # reference: the package's pointwise functions (each checked against scipy above) summed by numpy
    np.testing.assert_allclose(r, c * pointwise_derivative(loss, y, z), rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(h, c * pointwise_curvature(loss, y, z), rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(sums, [c @ pointwise_loss(loss, y, z), c.sum(), r.sum(), h.sum()], rtol=1e-12)
    bits = np.zeros((n + 63) // 64, dtype=np.uint64)
    slot = np.empty(batch.indices.shape[0], dtype=np.int32)
    cols = batch_support(batch.indices, bits, slot)
    assert not bits.any()
    # reference: numpy's sorted distinct values, and the slot of each entry pointing back to its bucket
    np.testing.assert_array_equal(cols, np.unique(batch.indices))
    np.testing.assert_array_equal(cols[slot], batch.indices)
    g, d = np.empty(cols.shape[0]), np.empty(cols.shape[0])
    scatter_gradient_curvature(batch.indptr, slot, batch.data, r, h, 0.25, g, d)
    X = batch_csr(batch, n).toarray()
    # reference: X^T r and the diagonal of X^T diag(h) X with numpy dense algebra (row 0 holds one
    # bucket twice, so the entries of a row are added before squaring)
    np.testing.assert_allclose(g, 0.25 * (X.T @ r)[cols], rtol=1e-12, atol=1e-14)
    ref = 0.25 * np.einsum("ij,i,ij->j", X, h, X)
    np.testing.assert_allclose(d, ref[cols], rtol=1e-12, atol=1e-14)
    assert set(np.flatnonzero(ref)) <= set(cols.tolist())  # every bucket with curvature is in the support


@pytest.mark.parametrize("loss", LOSSES)
def test_loss_and_derivative_from_one_exponential_equal_the_separate_functions(loss):
    # Reference: the package's loss and dloss (checked against scikit-learn, scipy and central differences
    # above), bit for bit, over margins of every size, both signs of zero and both labels.
    code = loss_code(loss)
    z = np.concatenate([np.random.default_rng(9).normal(scale=8.0, size=2000),
                        [0.0, -0.0, 1.0, -1.0, 800.0, -800.0]])
    for y in (0.0, 1.0):
        for zi in z:
            assert loss_dloss(code, y, zi) == (loss_fn(code, y, zi), dloss(code, y, zi))


@pytest.mark.parametrize("loss", LOSSES)
@pytest.mark.parametrize("k", [1, 3, 8])
def test_objectives_of_k_models_match_dense_algebra_and_the_one_model_kernels(loss, k):
    rng = np.random.default_rng(46 + k)
    n = 17
    batch = _batch(rng, n=n)
    code = loss_code(loss)
    slot = np.empty(batch.indices.shape[0], dtype=np.int32)
    cols = batch_support(batch.indices, np.zeros(1, dtype=np.uint64), slot)
    W = rng.normal(size=(cols.shape[0], k))
    b = rng.normal(size=k)
    WG = np.concatenate([W, np.full_like(W, np.nan)], axis=1)
    loss_sums, r_sums = np.empty(k), np.empty(k)
    weight_sum = objectives_into(code, batch.indptr, slot, batch.data, batch.labels, batch.weights, WG,
                                 tuple(b), loss_sums, r_sums)
    assert np.array_equal(WG[:, :k], W)
    G = WG[:, k:]
    X = batch_csr(batch, n).toarray()[:, cols]
    Z = X @ W + b
    c, y = batch.weights, batch.labels
    R = c[:, None] * np.stack([pointwise_derivative(loss, y, Z[:, j]) for j in range(k)], axis=1)
    # reference: numpy dense algebra on the package's pointwise functions (checked against scipy above):
    # sum_i c_i l(y_i, z_ik), sum_i r_ik, X^T R and sum_i c_i
    losses = [c @ pointwise_loss(loss, y, Z[:, j]) for j in range(k)]
    np.testing.assert_allclose(loss_sums, losses, rtol=1e-12)
    np.testing.assert_allclose(r_sums, R.sum(axis=0), rtol=1e-12, atol=1e-14)
    np.testing.assert_allclose(G, X.T @ R, rtol=1e-12, atol=1e-14)
    np.testing.assert_allclose(weight_sum, c.sum(), rtol=1e-14)
    # reference: the one-model kernels margins_into, residuals_into and scatter_compact on each column,
    # bit for bit (the same sums in the same order)
    for j in range(k):
        z, r, g = np.empty(batch.n_rows), np.empty(batch.n_rows), np.empty(cols.shape[0])
        margins_into(batch.indptr, slot, batch.data, W[:, j].copy(), b[j], z)
        one = residuals_into(code, batch.labels, batch.weights, z, r)
        scatter_compact(batch.indptr, slot, batch.data, r, 1.0, g)
        assert (loss_sums[j], weight_sum, r_sums[j]) == one
        assert np.array_equal(G[:, j], g)


def test_batch_support_matches_numpy_unique_across_bitmap_words():
    rng = np.random.default_rng(15)
    n = 5 * 64 + 7
    edges = np.array([0, 63, 64, 127, 128, n - 1, 63, 0], dtype=np.int32)  # word edges, repeated
    indices = np.concatenate([edges, rng.integers(0, n, 500).astype(np.int32)])
    bits = np.zeros((n + 63) // 64, dtype=np.uint64)
    slot = np.empty(indices.shape[0], dtype=np.int32)
    cols = batch_support(indices, bits, slot)
    # reference: numpy.unique's sorted distinct values and inverse indices
    ref, inverse = np.unique(indices, return_inverse=True)
    np.testing.assert_array_equal(cols, ref)
    np.testing.assert_array_equal(slot, inverse)
    assert not bits.any()  # the scratch bitmap is handed back cleared


def _pairs(rng, n, lam, history, dtype):
    """Random curvature pairs in the solver's storage: steps S, sparse data parts of y (CSR by slot,
    the intercept n always present) and the dense y they stand for."""
    size = n + 1
    S = rng.normal(size=(history, size)).astype(dtype)
    S64 = S.astype(np.float64)
    yidx_list, yval_list, dense_y = [], [], []
    for k in range(history):
        idx = np.append(np.sort(rng.choice(n, min(n, 40), replace=False)), n).astype(np.int32)
        val = rng.normal(size=idx.shape[0]) * 0.1 + 2.0 * S64[k][idx]  # keeps s.y > 0
        yidx_list.append(idx)
        yval_list.append(val)
        y = np.zeros(size)
        y[idx] = val
        y[:n] += lam * S64[k][:n]
        dense_y.append(y)
    yptr = np.zeros(history + 1, dtype=np.int64)
    yptr[1:] = np.cumsum([len(a) for a in yidx_list])
    return S, yptr, np.concatenate(yidx_list), np.concatenate(yval_list), np.array(dense_y)


def _direction(rng, n, lam, damp, history, order, dtype=np.float64):
    """Call lbfgs_direction on random pairs; return its outputs and the dense inputs for a reference."""
    S, yptr, yidx, yval, Y = _pairs(rng, n, lam, history, dtype)
    S64 = S.astype(np.float64)
    rho = 1.0 / np.einsum("kj,kj->k", S64, Y)
    assert (rho > 0).all()
    x = rng.normal(size=n + 1)
    G = S64 @ Y.T
    z = S64[:, :n] @ x[:n]
    gcols = np.append(np.sort(rng.choice(n, min(n, 30), replace=False)), n).astype(np.int32)
    gvals = rng.normal(size=gcols.shape[0])
    g = np.append(lam * x[:n], 0.0)
    g[gcols] += gvals
    diag = rng.uniform(0.0, 2.0, n + 1)
    diag[3] = -5.0  # a non-positive denominator maps to 0
    scale = 0.7
    ychunk = np.array([chunk_pointers(yidx[yptr[k]:yptr[k + 1]], n + 1) for k in range(history)])
    d = np.empty(n + 1, dtype=dtype)  # the dense passes work in the pairs' precision
    xd, dd, bound, p, yd, Sg = lbfgs_direction(x, gcols, gvals, chunk_pointers(gcols, n + 1), S, order,
                                               order.shape[0], rho, G, z, yptr, yidx, yval, ychunk, lam, n, diag,
                                               scale, damp, d)
    # reference: numpy fancy indexing and inner products with the sparse parts of y
    np.testing.assert_array_equal(Sg, S64[order][:, gcols])
    np.testing.assert_allclose(yd, [(Y[k] - np.append(lam * S64[k][:n], 0.0)) @ d for k in order], rtol=1e-9,
                               atol=1e-12)
    den = scale * diag + damp + np.append(np.full(n, lam), 0.0)
    h0 = np.where(den > 0, 1.0 / np.where(den > 0, den, 1.0), 0.0)
    return d, (xd, dd, bound, p), dict(S=S64, Y=Y, rho=rho, g=g, h0=h0, x=x)


def test_lbfgs_direction_matches_dense_bfgs_inverse_update():
    rng = np.random.default_rng(6)
    n, lam, damp, history = 12, 0.05, 0.01, 4
    order = np.array([2, 3, 0, 1], dtype=np.int64)  # a wrapped ring buffer, oldest first
    d, (xd, dd, bound, p), ref = _direction(rng, n, lam, damp, history, order)
    # reference: dense BFGS inverse update H+ = (I - rho s y^T) H (I - rho y s^T) + rho s s^T
    # ("Numerical Optimization", Springer, 2006, eq. 6.17; from memory), applied oldest to newest
    H = np.diag(ref["h0"])
    eye = np.eye(n + 1)
    for k in order:
        s, y, r = ref["S"][k], ref["Y"][k], ref["rho"][k]
        H = (eye - r * np.outer(s, y)) @ H @ (eye - r * np.outer(y, s)) + r * np.outer(s, s)
    np.testing.assert_allclose(d, H @ ref["g"], rtol=1e-10, atol=1e-12)
    # reference: numpy inner products and absolute sums of the returned direction
    x = ref["x"]
    assert xd == pytest.approx(x[:n] @ d[:n], rel=1e-12) and dd == pytest.approx(d[:n] @ d[:n], rel=1e-12)
    assert bound == pytest.approx(np.abs(x).sum() + np.abs(d).sum(), rel=1e-12)
    np.testing.assert_allclose(p, ref["S"][order][:, :n] @ d[:n], rtol=1e-10)


@pytest.mark.parametrize("dtype, rtol", [(np.float64, 1e-9), (np.float32, 1e-5)])
def test_lbfgs_direction_across_chunks_matches_textbook_two_loop(dtype, rtol):
    rng = np.random.default_rng(16)
    n, lam, damp, history = 3 * CHUNK + 777, 0.02, 0.05, 6
    order = np.array([4, 5, 0, 1, 2], dtype=np.int64)  # five of six slots in use, oldest first
    d, (_, _, _, p), ref = _direction(rng, n, lam, damp, history, order, dtype)
    # reference: the two-loop recursion, Algorithm 7.4 of "Numerical Optimization" (Springer, 2006; from
    # memory), in plain numpy on dense pairs
    q = ref["g"].copy()
    alpha = {}
    for k in order[::-1]:
        alpha[k] = ref["rho"][k] * (ref["S"][k] @ q)
        q -= alpha[k] * ref["Y"][k]
    r = ref["h0"] * q
    for k in order:
        beta = ref["rho"][k] * (ref["Y"][k] @ r)
        r += ref["S"][k] * (alpha[k] - beta)
    # float32 work: single-precision rounding of each term, relative to the largest entry
    np.testing.assert_allclose(d, r, rtol=rtol, atol=rtol * np.abs(r).max())
    np.testing.assert_allclose(p, ref["S"][order][:, :n] @ d[:n].astype(np.float64), rtol=rtol)


def test_combine_pass_without_pairs_and_finiteness_check():
    rng = np.random.default_rng(26)
    size = 2 * CHUNK + 5
    x = rng.normal(size=size)
    d = rng.normal(size=size)
    q = d.copy()
    none = np.zeros(0, dtype=np.int64)
    S = np.zeros((1, size), dtype=np.float32)
    empty = np.zeros(0, dtype=np.int32)
    ychunk = np.zeros((1, 4), dtype=np.int64)

    def combine(q):
        return combine_pass(q, S, none, 0, np.zeros(0), x, size - 1, np.zeros(2, np.int64), empty, np.zeros(0),
                            ychunk, np.zeros(0), np.zeros(0))

    xd, dd, bound = combine(q)
    # reference: numpy inner products and absolute sums
    assert xd == pytest.approx(x[:-1] @ d[:-1], rel=1e-12) and dd == pytest.approx(d[:-1] @ d[:-1], rel=1e-12)
    assert bound == pytest.approx(np.abs(x).sum() + np.abs(d).sum(), rel=1e-12)
    np.testing.assert_array_equal(q, d)
    for bad in (np.nan, np.inf):
        q = d.copy()
        q[-1] = bad  # the unregularized intercept is checked too
        assert not np.isfinite(combine(q)[2])


def test_fold_diagonal_is_the_exponential_average():
    rng = np.random.default_rng(36)
    size = 50
    lazy = np.zeros(size)
    scale = 1.0
    ref = np.zeros(size)
    for beta in [0.0, 0.5, 0.9, 1e-80, 1e-80, 0.0, 0.7]:  # 1e-80 twice forces a rescale
        cols = rng.choice(size - 1, 10, replace=False).astype(np.int32)
        curv = rng.random(10)
        last = rng.random()
        scale = fold_diagonal(lazy, scale, beta, cols, curv, last)
        # reference: the running average written out densely, beta * D + (1 - beta) * c (common practice)
        c = np.zeros(size)
        c[cols] = curv
        c[-1] = last
        ref = beta * ref + (1.0 - beta) * c
        np.testing.assert_allclose(scale * lazy, ref, rtol=1e-12, atol=1e-300)
        assert scale >= 1e-150  # fold_diagonal's documented rescale threshold, so scale never underflows


def test_line_kernels_match_numpy():
    rng = np.random.default_rng(7)
    batch = _batch(rng)
    z0 = rng.normal(size=batch.n_rows)
    u = rng.normal(size=batch.n_rows)
    code = loss_code("logistic")
    # reference: sklearn.metrics.log_loss (weighted mean) at the margins z0 + eps u
    ref = log_loss(batch.labels, expit(z0 - 0.3 * u), sample_weight=batch.weights, labels=[0, 1])
    assert line_loss(code, batch.labels, batch.weights, z0, u, -0.3) / batch.weights.sum() == pytest.approx(
        ref, rel=1e-12)
    r = np.empty(batch.n_rows)
    total = line_residuals(code, batch.labels, batch.weights, z0, u, -0.3, r)
    # reference: the logistic residual c (p - y) with p = scipy.special.expit
    np.testing.assert_allclose(r, batch.weights * (expit(z0 - 0.3 * u) - batch.labels), rtol=1e-12, atol=1e-15)
    assert total == pytest.approx(r.sum(), rel=1e-12)
    x = rng.normal(size=18)
    cols = np.array([4, 0, 9], dtype=np.int32)
    vals = rng.normal(size=3)
    # reference: numpy fancy indexing and an inner product
    assert sparse_dot(x, 0, np.append(cols, 17), np.append(vals, 0.5), 0, 4) == pytest.approx(
        vals @ x[cols] + 0.5 * x[17], rel=1e-12)
    assert sparse_dot(x[4:], 4, cols[[0, 2]], vals[[0, 2]], 0, 2) == pytest.approx(vals[[0, 2]] @ x[[4, 9]], rel=1e-12)


@pytest.mark.parametrize("eta", [0.0, 3.0])
def test_blend_into_gives_the_polynomial_decay_average(eta):
    rng = np.random.default_rng(44)
    iterates = rng.normal(size=(25, 31))
    avg = np.full(31, np.nan)  # the first blend (c = 1) must overwrite whatever the buffer held
    for t, x in enumerate(iterates, start=1):
        blend_into(avg, x[:-1], float(x[-1]), (eta + 1.0) / (t + eta))
    # reference: the weights of the polynomial-decay average written out, proportional to the rising
    # factorial t (t + 1) ... (t + eta - 1) = scipy.special.poch(t, eta) (eta = 0: the plain mean); the
    # closed form follows from multiplying out the recursion (from memory of "Stochastic Gradient Descent
    # for Non-smooth Optimization: Convergence Results and Optimal Averaging Schemes", ICML 2013)
    weights = poch(np.arange(1, 26), eta)
    np.testing.assert_allclose(avg, weights @ iterates / weights.sum(), rtol=1e-12)
