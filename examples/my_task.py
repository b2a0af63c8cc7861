"""A task file for `python -m benchmarks --task-file examples/my_task.py --quick --out results/my_task`.

The harness runs this file once and reads the names below; copy it and put your own problem in.
Here: classify points of a noisy spiral into three arms, with a small tanh MLP.
"""
import torch
from torch import nn

generator = torch.Generator().manual_seed(0)            # data of our own making, the same on every run
arm = torch.randint(0, 3, (3000,), generator=generator)  # which of three spiral arms a point lies on
radius = torch.rand(3000, generator=generator)
angle = 4.0 * radius + arm * (2 * torch.pi / 3) + 0.2 * torch.randn(3000, generator=generator)
points = torch.stack([radius * angle.cos(), radius * angle.sin()], dim=1)

train_data = (points[:2400], arm[:2400])    # (inputs, targets), or a torch.utils.data.Dataset of pairs
test_data = (points[2400:], arm[2400:])     # optional: held-out data, scored as accuracy here
criterion = nn.CrossEntropyLoss()           # the training loss, as an nn.Module
batch_size = 256
steps = 1200                                # steps per run; --quick runs quick_steps
quick_steps = 300
target_loss = 0.05                          # optional: leave it out and the harness proposes one


def make_model():                           # called once per run, after the run's seed is set
    return nn.Sequential(nn.Linear(2, 64), nn.Tanh(), nn.Linear(64, 64), nn.Tanh(), nn.Linear(64, 3))
