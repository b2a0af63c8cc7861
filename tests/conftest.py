"""Shared test settings."""
import torch

# The tests use small tensors, for which extra intra-op threads cost more than they bring
# (and fight with each other on a 2-core CI machine).
torch.set_num_threads(1)
