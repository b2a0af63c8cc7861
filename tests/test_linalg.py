"""Damped inversion and factored damping (``ngopt/linalg.py``) against numpy in float64."""
import math

import numpy as np
import pytest
import torch

from ngopt.linalg import (SINGLE_PRECISION_CONDITION, damped_inverse, factored_damping, inversion_dtype,
                          largest_eigenvalue_bound)


def _spd(n, seed, rank=None):
    rows = np.random.default_rng(seed).standard_normal((rank or 2 * n, n))
    return rows.T @ rows / rows.shape[0]


@pytest.mark.parametrize("n, shift", [(1, 0.3), (7, 1e-3), (40, 1e-2)])
def test_damped_inverse_is_the_inverse_of_the_shifted_matrix(n, shift):
    matrix = _spd(n, seed=n)
    result = damped_inverse(torch.from_numpy(matrix), shift)
    expected = np.linalg.inv(matrix + shift * np.eye(n))
    # Cholesky and LU of a matrix with condition number <= ~1e4 in float64: agreement far below 1e-9
    # (Higham, Accuracy and Stability of Numerical Algorithms, 2nd ed., ch. 10 and 14).
    np.testing.assert_allclose(result.inverse.numpy(), expected, rtol=1e-9, atol=1e-12)
    assert not result.used_fallback and result.eigenvalues is None


def test_damped_inverse_uses_the_symmetric_part_of_its_input():
    # Statistics formed by a matrix product are symmetric only up to rounding: an antisymmetric
    # part K (K^T = -K) is dropped, whichever triangle the factorization would have read.
    matrix = _spd(12, seed=3)
    antisymmetric = np.triu(np.random.default_rng(4).standard_normal((12, 12)), 1)
    antisymmetric = 1e-3 * (antisymmetric - antisymmetric.T)
    for want_spectrum in (False, True):
        clean = damped_inverse(torch.from_numpy(matrix), 0.05, want_spectrum)
        noisy = damped_inverse(torch.from_numpy(matrix + antisymmetric), 0.05, want_spectrum)
        np.testing.assert_allclose(noisy.inverse.numpy(), clean.inverse.numpy(), rtol=1e-10, atol=1e-13)


def test_damped_inverse_clips_round_off_negative_eigenvalues_when_cholesky_fails():
    # A rank-2 PSD matrix perturbed to a slightly negative eigenvalue, with a shift too small to
    # make it definite: Cholesky fails, and the nearest PSD matrix in Frobenius norm (Higham,
    # Linear Algebra Appl. 103, 1988: clip the negative eigenvalues) is inverted instead.
    vectors = np.linalg.qr(np.random.default_rng(0).standard_normal((5, 5)))[0]
    eigenvalues = np.array([-1e-4, 0.0, 0.0, 0.5, 2.0])
    matrix = (vectors * eigenvalues) @ vectors.T
    shift = 1e-6
    result = damped_inverse(torch.from_numpy(matrix), shift)
    expected = (vectors / (np.clip(eigenvalues, 0.0, None) + shift)) @ vectors.T
    assert result.used_fallback
    np.testing.assert_allclose(result.inverse.numpy(), expected, rtol=1e-8)


def test_damped_inverse_reports_the_undamped_spectrum_when_asked():
    matrix = _spd(9, seed=5)
    result = damped_inverse(torch.from_numpy(matrix), 0.1, want_spectrum=True)
    np.testing.assert_allclose(result.eigenvalues.numpy(), np.linalg.eigvalsh(matrix), rtol=1e-10, atol=1e-13)
    np.testing.assert_allclose(result.inverse.numpy(), np.linalg.inv(matrix + 0.1 * np.eye(9)), rtol=1e-9)
    assert not result.used_fallback  # the spectrum was asked for: no Cholesky failure happened


def test_damped_inverse_leaves_its_input_unchanged():
    matrix = torch.from_numpy(_spd(6, seed=8))
    before = matrix.clone()
    damped_inverse(matrix, 0.2)
    assert torch.equal(matrix, before)


def test_factored_damping_balances_the_factors_and_multiplies_to_lambda():
    # Martens & Grosse 2015, sec. 6.3: pi^2 = (tr A / dim A) / (tr G / dim G); the shifts are
    # pi sqrt(lambda) and sqrt(lambda) / pi, whose product is lambda.
    shift_in, shift_out = factored_damping(trace_in=12.0, dim_in=4, trace_out=0.6, dim_out=3, damping=1e-2)
    assert shift_in * shift_out == pytest.approx(1e-2, rel=1e-12)
    assert shift_in / shift_out == pytest.approx((12.0 / 4) / (0.6 / 3), rel=1e-12)
    # A dead factor has no scale: the shifts split evenly.
    assert factored_damping(0.0, 4, 0.6, 3, 1e-2) == pytest.approx((0.1, 0.1), rel=1e-12)
    assert all(math.isfinite(s) for s in factored_damping(1e300, 1, 1e-300, 1, 1e-2))


# Single-precision statistics.  Cholesky in float32 has a backward error of order n * 6e-8 and the
# inverse a relative error of order cond * 6e-8 (Higham, Accuracy and Stability of Numerical
# Algorithms, 2nd ed., ch. 10 and 14): ~6e-7 at the cond <= 11 of the two tests below, where 1e-4
# relative (in the Frobenius norm) is asserted, and ~6e-4 at the float32 path's limit, cond <= 1e4,
# where 1e-3 is.
@pytest.mark.parametrize("n", [40, 300])
def test_single_precision_statistics_are_inverted_in_float32_when_the_damping_keeps_them_well_conditioned(n):
    matrix = _spd(n, seed=n)
    shift = 0.1 * np.trace(matrix)  # cond <= (tr + shift) / shift = 11
    assert inversion_dtype(np.trace(matrix), shift, torch.float32) == torch.float32
    result = damped_inverse(torch.from_numpy(matrix), shift, precision=torch.float32)
    expected = np.linalg.inv(matrix + shift * np.eye(n))
    assert result.inverse.dtype == torch.float32  # returned in the precision it was computed in
    error = np.linalg.norm(result.inverse.numpy() - expected) / np.linalg.norm(expected)
    assert 1e-12 < error < 1e-4  # float32 rounding shows: the fast path ran


@pytest.mark.parametrize("n", [9, 65, 257])
def test_a_float32_factor_is_inverted_without_a_float64_copy_to_the_same_accuracy(n):
    # The float32 factor itself (no precision argument), against numpy's float64 inverse of the same
    # float32 numbers: the bound of the test above, 1e-4 relative at cond <= 1e3 (here cond <= 11).
    matrix = _spd(n, seed=n).astype(np.float32)
    shift = 0.1 * float(np.trace(matrix.astype(np.float64)))
    result = damped_inverse(torch.from_numpy(matrix), shift)
    expected = np.linalg.inv(matrix.astype(np.float64) + shift * np.eye(n))
    assert result.inverse.dtype == torch.float32 and not result.used_fallback
    error = np.linalg.norm(result.inverse.numpy() - expected) / np.linalg.norm(expected)
    assert error < 1e-4
    via_float64 = damped_inverse(torch.from_numpy(matrix.astype(np.float64)), shift, precision=torch.float32)
    np.testing.assert_allclose(result.inverse.numpy(), via_float64.inverse.numpy(), rtol=1e-5, atol=1e-7)


def test_the_largest_eigenvalue_bound_bounds_numpys_largest_eigenvalue_and_is_exact_for_a_diagonal():
    # Gershgorin: every eigenvalue lies within max_i sum_j |a_ij|; for a positive semi-definite matrix the
    # trace, the sum of the eigenvalues, bounds the largest too (Horn & Johnson, Matrix Analysis, 2nd ed.,
    # thm. 6.1.1 and sec. 1.2).  The bound is the smaller of the two.
    for seed, rank in [(0, None), (1, 3), (2, 1)]:
        matrix = _spd(30, seed=seed, rank=rank)
        largest = np.linalg.eigvalsh(matrix)[-1]
        bound = largest_eigenvalue_bound(torch.from_numpy(matrix))
        assert largest * (1 - 1e-12) <= bound <= min(np.trace(matrix), np.abs(matrix).sum(1).max()) * (1 + 1e-12)
    diagonal = np.diag([0.5, 3.0, 2.0])
    assert largest_eigenvalue_bound(torch.from_numpy(diagonal)) == pytest.approx(3.0, rel=1e-15)
    # A batch of matrices: the largest over the batch.
    batch = torch.from_numpy(np.stack([diagonal, 2 * diagonal]))
    assert largest_eigenvalue_bound(batch) == pytest.approx(6.0, rel=1e-15)


def _spread_spectrum(n: int, decades: float, seed: int) -> np.ndarray:
    """A symmetric matrix with eigenvalues 1 ... 10^-decades, geometrically spaced, in a random basis."""
    vectors, _ = np.linalg.qr(np.random.default_rng(seed).standard_normal((n, n)))
    return (vectors * np.logspace(0.0, -decades, n)) @ vectors.T


@pytest.mark.parametrize("n", [64, 300])
def test_a_float32_factor_at_the_float32_paths_condition_limit_is_inverted_in_float32_within_its_bound(n):
    # Spectrum 1 ... 1e-6 and a shift that puts the condition bound just inside 1e4: the largest
    # eigenvalue is 1 and the trace about 0.07 n, so the row-sum bound decides and the true condition
    # number is within a few times the bound.  Error against numpy's float64 inverse of the same
    # float32 numbers: 1e-3 relative (the estimate above, ~6e-4, with room).
    matrix = _spread_spectrum(n, 6.0, seed=n).astype(np.float32)
    bound = largest_eigenvalue_bound(torch.from_numpy(matrix))
    shift = bound / (0.9 * SINGLE_PRECISION_CONDITION - 1.0)
    true_condition = (1.0 + shift) / shift
    assert 0.1 * SINGLE_PRECISION_CONDITION < true_condition <= SINGLE_PRECISION_CONDITION
    result = damped_inverse(torch.from_numpy(matrix), shift)
    assert result.inverse.dtype == torch.float32 and not result.used_fallback
    expected = np.linalg.inv(matrix.astype(np.float64) + shift * np.eye(n))
    error = np.linalg.norm(result.inverse.numpy() - expected) / np.linalg.norm(expected)
    assert 1e-9 < error < 1e-3  # float32 rounding shows: the fast path ran


def test_a_float32_factor_just_past_the_condition_limit_is_inverted_in_float64():
    matrix = _spread_spectrum(64, 6.0, seed=2).astype(np.float32)
    bound = largest_eigenvalue_bound(torch.from_numpy(matrix))
    shift = bound / (2.0 * SINGLE_PRECISION_CONDITION - 1.0)  # the bound: 2e4
    result = damped_inverse(torch.from_numpy(matrix), shift)
    expected = np.linalg.inv(matrix.astype(np.float64) + shift * np.eye(64))
    assert result.inverse.dtype == torch.float64
    np.testing.assert_allclose(result.inverse.numpy(), expected, rtol=1e-8, atol=1e-8 * np.abs(expected).max())


def test_an_ill_conditioned_float32_factor_is_inverted_in_float64():
    # At the bottom of the damping range the float32 bound fails (cond up to 1e6): the float32 numbers
    # are inverted in float64, to float64 accuracy (numpy.linalg.inv of the same numbers).
    matrix = _spd(40, seed=7).astype(np.float32)
    shift = 1e-6 * float(np.trace(matrix.astype(np.float64)))
    result = damped_inverse(torch.from_numpy(matrix), shift)
    expected = np.linalg.inv(matrix.astype(np.float64) + shift * np.eye(40))
    assert result.inverse.dtype == torch.float64
    np.testing.assert_allclose(result.inverse.numpy(), expected, rtol=1e-6, atol=1e-6 * np.abs(expected).max())


def test_an_indefinite_float32_factor_takes_the_float64_eigen_fallback():
    # Round-off negative eigenvalues, shift far below them: Cholesky fails in float32; the fallback
    # clips the negative eigenvalues (Higham 1988) in float64, as for float64 input.
    rng = np.random.default_rng(3)
    vectors, _ = np.linalg.qr(rng.standard_normal((12, 12)))
    values = np.linspace(-1e-3, 1.0, 12)
    matrix = ((vectors * values) @ vectors.T).astype(np.float32)
    shift = 1e-9
    result = damped_inverse(torch.from_numpy(matrix), shift)
    assert result.used_fallback and result.inverse.dtype == torch.float64
    sym = 0.5 * (matrix.astype(np.float64) + matrix.astype(np.float64).T)
    w, v = np.linalg.eigh(sym)
    expected = (v / (np.clip(w, 0.0, None) + shift)) @ v.T
    np.testing.assert_allclose(result.inverse.numpy(), expected, rtol=1e-8, atol=1e-8 * np.abs(expected).max())


def test_a_badly_conditioned_single_precision_factor_is_inverted_in_float64():
    matrix = _spd(40, seed=5)
    shift = 1e-6 * np.trace(matrix)  # cond bound 1e6: float32 could lose every digit
    assert inversion_dtype(np.trace(matrix), shift, torch.float32) == torch.float64
    result = damped_inverse(torch.from_numpy(matrix), shift, precision=torch.float32)
    expected = np.linalg.inv(matrix + shift * np.eye(40))
    np.testing.assert_allclose(result.inverse.numpy(), expected, rtol=1e-6, atol=1e-6 * np.abs(expected).max())


def test_double_precision_statistics_are_always_inverted_in_float64():
    assert inversion_dtype(1.0, 10.0, torch.float64) == torch.float64
    assert inversion_dtype(1.0, 0.0, torch.float32) == torch.float64
    assert inversion_dtype(math.inf, 1.0, torch.float32) == torch.float64


@pytest.mark.parametrize("layout", ["contiguous", "transposed", "mixed", "strided"])
def test_flat_dot_is_the_sum_of_products_in_every_layout(layout):
    # Reference: numpy's sum of the elementwise product in float64.  Float32 inputs accumulate in float32:
    # within 4 sqrt(n) eps32 sum|a b| (the usual probabilistic bound on a sum's rounding; common practice).
    from ngopt.linalg import flat_dot
    generator = torch.Generator().manual_seed(0)
    a = torch.randn(40, 30, generator=generator)
    b = torch.randn(40, 30, generator=generator)
    if layout == "transposed":      # an embedding's gradient matrix and its proposal: transposed views
        a, b = a.T.contiguous().T, b.T.contiguous().T
    elif layout == "mixed":
        a = a.T.contiguous().T
    elif layout == "strided":
        a, b = torch.randn(40, 60, generator=generator)[:, ::2], torch.randn(40, 60, generator=generator)[:, ::2]
    products = a.double().numpy() * b.double().numpy()
    expected = float(products.sum())
    bound = 4 * math.sqrt(products.size) * float(torch.finfo(torch.float32).eps) * float(np.abs(products).sum())
    assert float(flat_dot(a, b)) == pytest.approx(expected, abs=bound)
    assert float(flat_dot(a.double(), b.double())) == pytest.approx(expected, rel=1e-12)


@pytest.mark.parametrize("layout", ["contiguous", "transposed", "strided"])
@pytest.mark.parametrize("shape", [(40, 30), (100, 101)], ids=["stacked-product", "three-dots"])
def test_pair_gram_is_the_dense_gram_matrix(shape, layout):
    # Reference: numpy's Gram matrix of the two flattened tensors in float64; float32 sums within
    # 4 sqrt(n) eps32 sum|x y| of it (the usual probabilistic bound on a sum's rounding; common practice).
    # Both paths (stacked product below PAIR_PRODUCT_MAX_NUMEL entries, three dot products above).
    from ngopt.linalg import PAIR_PRODUCT_MAX_NUMEL, pair_gram
    assert (shape[0] * shape[1] <= PAIR_PRODUCT_MAX_NUMEL) == (shape == (40, 30))
    generator = torch.Generator().manual_seed(1)
    a = torch.randn(*shape, generator=generator)
    b = torch.randn(*shape, generator=generator) + 0.5 * a
    if layout == "transposed":      # an embedding's gradient matrix and its proposal: transposed views
        a, b = a.T.contiguous().T, b.T.contiguous().T
    elif layout == "strided":
        a, b = a.repeat(1, 2)[:, ::2], b.repeat(1, 2)[:, ::2]
    flat = np.stack([a.double().numpy().ravel(), b.double().numpy().ravel()])
    expected = flat @ flat.T
    bounds = 4 * math.sqrt(flat.shape[1]) * float(torch.finfo(torch.float32).eps) * (np.abs(flat) @ np.abs(flat).T)
    gram = pair_gram(a, b)
    assert gram.shape == (2, 2) and gram.dtype == torch.float32
    assert np.all(np.abs(gram.double().numpy() - expected) <= bounds)
    np.testing.assert_allclose(pair_gram(a.double(), b.double()).numpy(), expected, rtol=1e-12)


@pytest.mark.parametrize("dtype", [torch.bfloat16, torch.float16])
def test_a_half_precision_factor_is_inverted_in_float32(dtype):
    # A model kept in half precision keeps its statistics in it; LAPACK has no half types, so the
    # factor is inverted in float32, to float32 accuracy against numpy's float64 inverse of the same
    # numbers (cond <= 11 here: the bound of the float32 test above).
    matrix = torch.from_numpy(_spd(20, seed=11)).to(dtype)
    values = matrix.double().numpy()
    shift = 0.1 * float(np.trace(values))
    result = damped_inverse(matrix, shift)
    expected = np.linalg.inv(values + shift * np.eye(20))
    assert result.inverse.dtype == torch.float32 and not result.used_fallback
    assert np.linalg.norm(result.inverse.numpy() - expected) / np.linalg.norm(expected) < 1e-5


def test_inversions_run_on_a_thread_count_fitted_to_the_factor_size_and_restore_it():
    # common practice: a factorization of a few hundred rows gains nothing from many threads
    from ngopt import linalg
    before = torch.get_num_threads()
    torch.set_num_threads(4)
    try:
        for dim, expected in ((33, 1), (129, 1), (257, 2), (513, 4), (100_000, 4)):
            with linalg.inversion_threads(dim):
                assert torch.get_num_threads() == expected, dim
            assert torch.get_num_threads() == 4
        with pytest.raises(RuntimeError, match="inside"):
            with linalg.inversion_threads(33):
                raise RuntimeError("inside")
        assert torch.get_num_threads() == 4  # restored after an error too
    finally:
        torch.set_num_threads(before)


def test_the_inversion_phase_runs_under_the_fitted_thread_count():
    from ngopt.step_pipeline import new_inverses
    seen = []

    class Block:
        def inversion_plan(self, statistics, damping):
            return None

        def prepare_inverse(self, statistics, damping, want_spectrum):
            seen.append(torch.get_num_threads())
            return {"inverse": torch.eye(2)}, {}

    before = torch.get_num_threads()
    torch.set_num_threads(4)
    try:
        jobs = [(Block(), {"factor_in": torch.eye(33), "factor_out": torch.eye(300)}, 1e-3),
                (Block(), {"factor_in": torch.eye(9), "scale": 1.0}, 1e-3)]
        assert new_inverses(jobs) is not None
        assert seen == [2, 2] and torch.get_num_threads() == 4  # the largest factor, 300 rows, sets it
    finally:
        torch.set_num_threads(before)


def test_the_thread_timing_script_marks_the_count_it_picks(capsys):
    import runpy
    from pathlib import Path
    script = runpy.run_path(str(Path(__file__).resolve().parents[1] / "scripts" / "inversion_threads.py"),
                            run_name="inversion_threads")
    before = torch.get_num_threads()
    torch.set_num_threads(2)  # ngopt picks 1 thread for 9 rows, 2 for 300 (at most the process's count)
    try:
        assert script["main"](["--dims", "9", "300", "--threads", "1", "2", "--budget", "1e3"]) == 0
    finally:
        torch.set_num_threads(before)
    rows = [line for line in capsys.readouterr().out.splitlines() if line.startswith("| 9 |") or
            line.startswith("| 300 |")]
    assert rows[0].split("|")[2].strip().endswith("*") and rows[1].split("|")[3].strip().endswith("*")
    with pytest.raises(SystemExit):
        script["main"](["--threads", "0"])


def test_a_step_that_inverts_nothing_leaves_the_thread_count_alone(monkeypatch):
    # Most steps have no inversion job: no change of the process's thread count on them.
    from ngopt.step_pipeline import new_inverses
    before = torch.get_num_threads()
    torch.set_num_threads(4)  # above what an empty phase would pick (1), on any machine
    calls = []
    try:
        with monkeypatch.context() as patched:
            patched.setattr(torch, "set_num_threads", lambda n: calls.append(n))
            assert new_inverses([]) == {}
    finally:
        torch.set_num_threads(before)
    assert calls == []
