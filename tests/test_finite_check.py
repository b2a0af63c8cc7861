"""The one finiteness check a step makes of everything it would write (``step_pipeline.all_finite``).

Reference: IEEE 754 binary formats, through ``torch.finfo``: the largest finite float16 is 65504,
float32 about 3.4e38, bfloat16 about 3.39e38, float64 about 1.8e308.  A tensor passes when every entry
times its factor is finite in the tensor's own dtype, i.e. when the update the step would add
(``factor * tensor``) cannot overflow.
"""
import pytest
import torch

from ngopt.step_pipeline import all_finite


def test_finite_tensors_pass_and_nothing_passes_trivially():
    assert all_finite([])
    assert all_finite([torch.ones(3), torch.zeros(2, 2, dtype=torch.float64), torch.ones((), dtype=torch.float16)])


@pytest.mark.parametrize("bad", [float("nan"), float("inf"), -float("inf")])
@pytest.mark.parametrize("dtype", [torch.float16, torch.bfloat16, torch.float32, torch.float64])
def test_a_single_non_finite_entry_fails(bad, dtype):
    tensor = torch.ones(4, 5, dtype=dtype)
    tensor[2, 3] = bad
    assert not all_finite([torch.ones(3), tensor])
    assert not all_finite([tensor, torch.ones(3)], [1.0, 1.0])


def test_a_factor_that_would_overflow_the_tensors_dtype_fails():
    # 1e30 * 1e10 = 1e40: past float32's largest value (3.4e38), well within float64's.
    assert not all_finite([torch.full((2,), 1e30)], [1e10])
    assert all_finite([torch.full((2,), 1e30, dtype=torch.float64)], [1e10])
    # 60000 * 2 = 120000: past float16's 65504, within bfloat16's range.
    assert not all_finite([torch.full((2,), 60000.0, dtype=torch.float16)], [2.0])
    assert all_finite([torch.full((2,), 60000.0, dtype=torch.bfloat16)], [2.0])
    # The factor's sign does not matter; a negative one is checked by its size.
    assert not all_finite([torch.full((2,), 1e30)], [-1e10])


def test_a_zero_factor_does_not_hide_a_non_finite_tensor():
    assert all_finite([torch.ones(3)], [0.0])
    assert not all_finite([torch.tensor([1.0, float("inf")])], [0.0])
    assert not all_finite([torch.tensor([float("nan")])], [0.0])


def test_a_non_finite_factor_fails():
    assert not all_finite([torch.ones(3)], [float("inf")])
    assert not all_finite([torch.ones(3)], [float("nan")])
