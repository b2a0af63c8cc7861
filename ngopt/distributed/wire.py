"""Wire formats: statistics packed into flat buffers (upper triangles of symmetric factors), inverse payloads."""
from __future__ import annotations

import json
from typing import Dict, List, Optional, Sequence, Tuple

import torch

from ..blocks.base import LayerCurvature


_HEADER_LENGTH_BYTES = 8


class StatisticsBucket:
    """The flat layout of all blocks' statistics of one dtype: values (triangles where symmetric), then counts."""

    def __init__(self, entries, dtype):
        self.entries = entries  # [(block, [(key, shape, symmetric)])] in the blocks' order
        self.dtype = dtype
        self.value_count = sum(_packed_size(shape, symmetric)
                               for _, keys in entries for _, shape, symmetric in keys)

    @property
    def size(self) -> int:
        return self.value_count + len(self.entries)

    def pack(self, batches, device) -> torch.Tensor:
        buffer = torch.zeros(self.size, dtype=self.dtype, device=device)
        offset = 0
        for index, (block, keys) in enumerate(self.entries):
            batch = batches.get(block)
            for key, shape, symmetric in keys:
                width = _packed_size(shape, symmetric)
                if batch is not None:
                    buffer[offset:offset + width] = _flatten(batch[key], symmetric).to(device)
                offset += width
            if batch is not None:
                buffer[self.value_count + index] = 1.0
        return buffer

    def unpack(self, buffer) -> Dict[LayerCurvature, dict]:
        averaged = {}
        offset = 0
        counts = buffer[self.value_count:].tolist()
        for (block, keys), count in zip(self.entries, counts):
            tensors = {}
            for key, shape, symmetric in keys:
                width = _packed_size(shape, symmetric)
                if count > 0:
                    values = buffer[offset:offset + width] / count
                    tensors[key] = _unflatten(values, shape, symmetric).to(block.layer.weight.device)
                offset += width
            if count > 0:
                averaged[block] = tensors
        return averaged


def _statistics_buckets(blocks: Sequence[LayerCurvature], batches,
                        projected: bool = False) -> List[StatisticsBucket]:
    """One bucket per statistics dtype (normally a single one), blocks in the optimizer's order."""
    by_dtype: Dict[torch.dtype, list] = {}
    for block in blocks:
        keys = [(key, shape, key in _symmetric_keys(block))
                for key, shape in _statistic_shapes(block, batches, projected)]
        by_dtype.setdefault(block.layer.weight.dtype, []).append((block, keys))
    return [StatisticsBucket(entries, dtype) for dtype, entries in by_dtype.items()]


def _statistic_shapes(block: LayerCurvature, batches, projected: bool = False) -> List[Tuple[str, Tuple[int, ...]]]:
    """Shapes of a block's statistics (or projected ones), known on every rank even where it recorded nothing."""
    shapes = block.statistic_shapes()
    keys = block.projected_keys if projected else block.statistic_keys
    return [(key, tuple(shapes[key])) for key in keys]


def _symmetric_keys(block: LayerCurvature) -> Tuple[str, ...]:
    """Statistics symmetric by construction (``E[a a^T]``, ``E[g g^T]``), as the block declares them."""
    return tuple(block.symmetric_statistic_keys)


_TRIANGLES: Dict[Tuple[int, str], torch.Tensor] = {}


def _upper_triangle(size: int, device) -> torch.Tensor:
    key = (size, str(device))
    if key not in _TRIANGLES:
        _TRIANGLES[key] = torch.triu_indices(size, size, device=device)
    return _TRIANGLES[key]


def _packed_size(shape, symmetric: bool) -> int:
    if symmetric:
        return shape[0] * (shape[0] + 1) // 2
    count = 1
    for dim in shape:
        count *= dim
    return count


def _flatten(tensor: torch.Tensor, symmetric: bool) -> torch.Tensor:
    if not symmetric:
        return tensor.reshape(-1)
    rows, cols = _upper_triangle(tensor.shape[0], tensor.device)
    return tensor[rows, cols]


def _unflatten(values: torch.Tensor, shape, symmetric: bool) -> torch.Tensor:
    if not symmetric:
        return values.reshape(shape)
    rows, cols = _upper_triangle(shape[0], values.device)
    matrix = values.new_empty(shape)
    matrix[rows, cols] = values
    matrix[cols, rows] = values
    return matrix


def encode_inverses(results: Dict[LayerCurvature, tuple], error: Optional[BaseException], rank: int,
                    device=None) -> torch.Tensor:
    """One byte buffer: ``[header length][JSON header][raw tensor bytes...]``, exact to the bit.

    The header lists, per block, the tensors (key, shape, dtype, whether on the CPU)
    and the plain ``info`` values; ``info`` tensors (eigenvalues) travel as tensors.
    """
    header: dict = {"blocks": []}
    chunks: List[torch.Tensor] = []
    if error is not None:
        header["error"] = f"rank {rank}: {type(error).__name__}: {error}"
    else:
        for block, (tensors, info) in results.items():
            entry = {"name": block.layer.name, "tensors": [], "info": {}, "info_tensors": []}
            for key, value in tensors.items():
                entry["tensors"].append(_tensor_spec(key, value))
                chunks.append(_as_bytes(value))
            for key, value in info.items():
                if isinstance(value, torch.Tensor):
                    entry["info_tensors"].append(_tensor_spec(key, value))
                    chunks.append(_as_bytes(value))
                elif value is None or isinstance(value, (bool, int, float, str)):
                    entry["info"][key] = value
                else:
                    raise TypeError(f"{block.layer.name}: info[{key!r}] is a {type(value).__name__}; "
                                    "inverse info must hold numbers, bools, strings, None or tensors")
            header["blocks"].append(entry)
    header_bytes = json.dumps(header).encode()
    device = torch.device("cpu") if device is None else device
    length = torch.tensor([len(header_bytes)], dtype=torch.int64).view(torch.uint8)
    head = torch.cat([length, torch.frombuffer(bytearray(header_bytes), dtype=torch.uint8)]).to(device)
    return torch.cat([head] + [c.to(device) for c in chunks])


def decode_inverses(buffer: torch.Tensor, blocks_by_name: Dict[str, LayerCurvature]):
    """Inverse of :func:`encode_inverses`: ``({block: (tensors, info)}, error message or None)``."""
    length = int(buffer[:_HEADER_LENGTH_BYTES].cpu().clone().view(torch.int64))  # clone: slices may be unaligned
    start = _HEADER_LENGTH_BYTES
    header = json.loads(buffer[start:start + length].cpu().numpy().tobytes())
    offset = start + length
    results = {}
    for entry in header["blocks"]:
        block = blocks_by_name[entry["name"]]
        tensors, info = {}, dict(entry["info"])
        for spec in entry["tensors"]:
            tensors[spec[0]], offset = _from_bytes(buffer, offset, spec, block)
        for spec in entry["info_tensors"]:
            info[spec[0]], offset = _from_bytes(buffer, offset, spec, block)
        results[block] = (tensors, info)
    return results, header.get("error")


def _tensor_spec(key: str, tensor: torch.Tensor) -> list:
    return [key, list(tensor.shape), str(tensor.dtype).replace("torch.", ""), tensor.device.type == "cpu"]


def _as_bytes(tensor: torch.Tensor) -> torch.Tensor:
    return tensor.detach().contiguous().reshape(-1).view(torch.uint8)


def _from_bytes(buffer, offset, spec, block):
    key, shape, dtype_name, on_cpu = spec
    dtype = getattr(torch, dtype_name)
    count = 1
    for dim in shape:
        count *= dim
    width = count * torch.empty((), dtype=dtype).element_size()
    tensor = buffer[offset:offset + width].clone().view(dtype).reshape(shape)
    device = torch.device("cpu") if on_cpu else block.layer.weight.device
    return tensor.to(device), offset + width
