"""Equal-size factors inverted together (``ngopt.linalg.damped_inverses``, ``ngopt.step_pipeline.invert_blocks``)
against numpy's float64 inverse and against the one-factor path."""
from __future__ import annotations

import inspect
import runpy
from pathlib import Path

import numpy as np
import pytest
import torch
from torch import nn

import ngopt
import ngopt.blocks as blocks_package
from ngopt.blocks.base import LayerCurvature
from ngopt.blocks.kronecker import KroneckerBlock
from ngopt.linalg import SINGLE_PRECISION_CONDITION, damped_inverse, damped_inverses, largest_eigenvalue_bound
from ngopt.step_pipeline import invert_blocks


def _spread_spectrum(n: int, decades: float, seed: int) -> np.ndarray:
    """A symmetric matrix with eigenvalues 1 ... 10^-decades, geometrically spaced, in a random basis."""
    vectors, _ = np.linalg.qr(np.random.default_rng(seed).standard_normal((n, n)))
    return (vectors * np.logspace(0.0, -decades, n)) @ vectors.T


def _shift_for_bound(matrix: np.ndarray, bound: float) -> float:
    """The shift at which the float32 path's condition bound, (bound on lambda_max + shift) / shift, is ``bound``."""
    return largest_eigenvalue_bound(torch.from_numpy(matrix)) / (bound - 1.0)


def _relative_error(inverse: torch.Tensor, matrix: np.ndarray, shift: float) -> float:
    sym = 0.5 * (matrix.astype(np.float64) + matrix.astype(np.float64).T)
    expected = np.linalg.inv(sym + shift * np.eye(matrix.shape[0]))
    return float(np.abs(inverse.double().numpy() - expected).max() / np.abs(expected).max())


def _requests():
    """Three sizes, two precisions; in the 33-row float32 group the shifts put two factors on the float32 path
    (one at the bottom of the damping range, its bound at 0.9 of the limit) and one past it (float64)."""
    float32 = [_spread_spectrum(33, 6.0, seed=s).astype(np.float32) for s in range(3)]
    shifts32 = [_shift_for_bound(float32[0], 0.9 * SINGLE_PRECISION_CONDITION),
                _shift_for_bound(float32[1], 10.0), _shift_for_bound(float32[2], 20 * SINGLE_PRECISION_CONDITION)]
    float64 = [_spread_spectrum(16, 6.0, seed=10 + s) for s in range(2)]
    shifts64 = [1e-6, 1e-2]  # float64 statistics: float64 whatever the condition (cond ~1e6 at 1e-6)
    single = _spread_spectrum(5, 2.0, seed=20).astype(np.float32)
    matrices = float32[:2] + float64[:1] + [single] + float32[2:] + float64[1:]
    shifts = shifts32[:2] + shifts64[:1] + [1e-3] + shifts32[2:] + shifts64[1:]
    return matrices, shifts


def test_batched_inverses_are_numpys_float64_inverses_within_each_paths_bound():
    matrices, shifts = _requests()
    results = damped_inverses([(torch.from_numpy(m), s, None) for m, s in zip(matrices, shifts)])
    assert len(results) == len(matrices)
    for matrix, shift, result in zip(matrices, shifts, results):
        alone = damped_inverse(torch.from_numpy(matrix), shift)
        assert result.inverse.dtype == alone.inverse.dtype  # the same path as the factor alone
        assert not result.used_fallback and result.eigenvalues is None
        error = _relative_error(result.inverse, matrix, shift)
        # float32 Cholesky within cond * 6e-8 (Higham, Accuracy and Stability of Numerical Algorithms, 2nd ed.,
        # ch. 10 and 14): at most 6e-4 up to the limit of 1e4; float64: cond <= ~1e6 times 1.1e-16.
        assert error < (1e-3 if result.inverse.dtype == torch.float32 else 1e-8), (matrix.shape, shift, error)
        # against the one-factor path: the same LAPACK routines on the same numbers, to rounding
        scale = float(alone.inverse.double().abs().max())
        tolerance = 1e-5 if result.inverse.dtype == torch.float32 else 1e-12
        assert float((result.inverse.double() - alone.inverse.double()).abs().max()) <= tolerance * scale
    dtypes = [r.inverse.dtype for r in results]
    assert dtypes == [torch.float32, torch.float32, torch.float64, torch.float32, torch.float64, torch.float64]


def test_each_batched_inverse_owns_its_storage():
    # A view into the batch would keep, and state_dict() would save, every other factor's inverse too.
    matrices, shifts = _requests()
    for result in damped_inverses([(torch.from_numpy(m), s, None) for m, s in zip(matrices, shifts)]):
        inverse = result.inverse
        assert inverse.untyped_storage().nbytes() == inverse.numel() * inverse.element_size()


def test_a_factor_whose_cholesky_fails_takes_the_eigen_path_alone_and_its_batch_does_not():
    # One indefinite factor (eigenvalues down to -1e-2, a shift far below them) among two positive definite
    # ones of its size: its inverse is the damped inverse of the nearest positive semi-definite matrix
    # (negative eigenvalues clipped to 0, Higham 1988), computed in float64; the others are untouched.
    rng = np.random.default_rng(5)
    vectors, _ = np.linalg.qr(rng.standard_normal((12, 12)))
    indefinite = (vectors * np.linspace(-1e-2, 1.0, 12)) @ vectors.T
    good = [_spread_spectrum(12, 2.0, seed=s) for s in (6, 7)]
    matrices, shift = [good[0], indefinite, good[1]], 1e-6
    results = damped_inverses([(torch.from_numpy(m), shift, None) for m in matrices])
    assert [r.used_fallback for r in results] == [False, True, False]
    w, v = np.linalg.eigh(indefinite)
    expected = (v / (np.clip(w, 0.0, None) + shift)) @ v.T
    np.testing.assert_allclose(results[1].inverse.numpy(), expected, rtol=1e-8, atol=1e-8 * np.abs(expected).max())
    for index in (0, 2):
        assert _relative_error(results[index].inverse, matrices[index], shift) < 1e-8


def test_large_factors_go_alone_and_batches_are_bounded_in_size(monkeypatch):
    # Above BATCHED_MAX_ROWS a factor is inverted alone (a batch saves nothing there and would hold a second
    # copy of many large factors); a group is split into batches of at most BATCHED_MAX_ENTRIES entries.
    import ngopt.linalg as linalg
    batches = []
    real = linalg._invert_group

    def spy(prepared, indices, results):
        batches.append([prepared[i][0].shape[0] for i in indices])
        return real(prepared, indices, results)

    monkeypatch.setattr(linalg, "_invert_group", spy)
    monkeypatch.setattr(linalg, "BATCHED_MAX_ROWS", 10)
    monkeypatch.setattr(linalg, "BATCHED_MAX_ENTRIES", 2 * 8 * 8)
    matrices = [_spread_spectrum(12, 2.0, seed=s) for s in range(2)] + [_spread_spectrum(8, 2.0, seed=s)
                                                                          for s in range(2, 7)]
    results = damped_inverses([(torch.from_numpy(m), 1e-3, None) for m in matrices])
    assert batches == [[8, 8], [8, 8]]  # the 12-row factors alone, the fifth 8-row factor alone
    for matrix, result in zip(matrices, results):
        assert _relative_error(result.inverse, matrix, 1e-3) < 1e-8


def test_a_half_precision_factor_joins_float32_statistics_of_its_size():
    # LAPACK has no half types: a bfloat16 statistic is inverted as float32 numbers, as alone.
    matrix = _spread_spectrum(8, 2.0, seed=1)
    requests = [(torch.from_numpy(matrix).to(torch.bfloat16), 1e-2, None),
                (torch.from_numpy(matrix).float(), 1e-2, None)]
    results = damped_inverses(requests)
    alone = damped_inverse(requests[0][0], 1e-2)
    assert results[0].inverse.dtype == alone.inverse.dtype == torch.float32
    torch.testing.assert_close(results[0].inverse, alone.inverse, rtol=1e-5, atol=1e-5)


def _trained(model, structure="kfac", steps=3, **options):
    torch.manual_seed(0)
    x, y = torch.randn(64, 6), torch.randint(0, 3, (64,))
    loss_fn = nn.CrossEntropyLoss()
    opt = ngopt.FisherDescent(model, loss_fn, structure=structure, **options)
    for _ in range(steps):
        opt.zero_grad()
        loss_fn(model(x), y).backward()
        opt.step()
    return opt


def _jobs(opt, damping=3e-3):
    return [(block, {key: block.state[key] for key in block.statistic_keys}, damping) for block in opt.blocks.values()]


def _equal_width_mlp():
    torch.manual_seed(0)
    return nn.Sequential(nn.Linear(6, 16), nn.Tanh(), nn.Linear(16, 16), nn.Tanh(), nn.Linear(16, 16), nn.Tanh(),
                         nn.Linear(16, 3))


def test_the_optimizers_batched_inversions_equal_each_blocks_own():
    opt = _trained(_equal_width_mlp())
    jobs = _jobs(opt)
    assert all(block.inversion_plan(stats, damping) is not None for block, stats, damping in jobs)
    batched = invert_blocks(jobs)
    assert list(batched) == [block for block, _, _ in jobs]  # the jobs' order
    for block, stats, damping in jobs:
        tensors, info = block.prepare_inverse(stats, damping, False)
        got_tensors, got_info = batched[block]
        assert got_info == info  # traces, shifts, no spectra, no fallback
        for key, value in tensors.items():
            torch.testing.assert_close(got_tensors[key], value, rtol=1e-5, atol=1e-6 * float(value.abs().max()))


def test_spectra_and_blocks_that_invert_their_own_way_keep_their_own_path():
    # EKFAC's eigenbases and spectra on request: invert_blocks is each block's prepare_inverse exactly.
    for structure, spectra in (("ekfac", False), ("kfac", True)):
        opt = _trained(_equal_width_mlp(), structure=structure)
        jobs = _jobs(opt)
        batched = invert_blocks(jobs, track_spectra=spectra)
        for block, stats, damping in jobs:
            tensors, info = block.prepare_inverse(stats, damping, spectra)
            assert batched[block][0].keys() == tensors.keys()
            for key, value in tensors.items():
                assert torch.equal(batched[block][0][key], value)
            assert (info.get("in_eigenvalues") is not None) == (spectra or structure == "ekfac")


def _subclasses(cls):
    for sub in cls.__subclasses__():
        yield sub
        yield from _subclasses(sub)


def test_a_block_that_inverts_its_own_way_does_not_inherit_a_plan():
    # A subclass of the Kronecker block that overrides prepare_inverse (EKFAC's eigenbases, per-group bases)
    # must not be batched by the Kronecker block's plan, which would skip its override.
    for module in Path(blocks_package.__file__).parent.glob("*.py"):
        __import__(f"ngopt.blocks.{module.stem}")
    checked = 0
    for cls in _subclasses(LayerCurvature):
        if inspect.getattr_static(cls, "inversion_plan") is inspect.getattr_static(KroneckerBlock, "inversion_plan"):
            assert cls.prepare_inverse is KroneckerBlock.prepare_inverse, cls.__name__
            checked += 1
    assert checked >= 2  # the Kronecker block and its grouped form at least


SCRIPT = runpy.run_path(str(Path(__file__).resolve().parents[1] / "scripts" / "batched_inversion_time.py"),
                        run_name="batched_inversion_time")


def test_the_timing_script_prints_one_row_per_task_with_both_ways_agreeing(capsys):
    assert SCRIPT["main"](["--tasks", "digits_mlp,friedman1_deep_mlp", "--steps", "2", "--repeats", "2"]) == 0
    rows = [line.split("|") for line in capsys.readouterr().out.splitlines() if line.startswith("| ")
            and not line.startswith("| task")]
    assert [row[1].strip() for row in rows] == ["digits_mlp", "friedman1_deep_mlp"]
    # digits MLP 64-128-128-10: factors of 65, 128, 129, 129, 128 and 10 rows
    assert rows[0][3].strip() == "6 (4)"
    assert all(float(row[7]) < 1e-4 for row in rows)  # float32 rounding, not a different inverse


def test_the_timing_script_refuses_an_unknown_task(capsys):
    with pytest.raises(SystemExit) as stopped:
        SCRIPT["main"](["--tasks", "no_such_task"])
    assert stopped.value.code == 2 and "no_such_task" in capsys.readouterr().err
