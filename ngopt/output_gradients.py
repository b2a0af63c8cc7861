"""Gradients of the criterion input with respect to every recorded layer output, from one extra pass.

:func:`batched_output_grads` asks ``torch.autograd.grad`` for all of them at once, so
they all exist together at the end of the pass: as much memory as the activations.
:func:`stream_output_grads` hands each layer's gradient to a callback as soon as the
pass has formed it, so that the caller can reduce it to statistics and let it go.  It
requests from autograd only the *lowest* recorded outputs (those with no other recorded
output below them in the graph); every other recorded layer lies on the way to one of
those, so the pass runs its node, and a pre-hook on that node sees the gradient with
respect to the layer's output (the node's incoming gradient) on its way through.
"""
from __future__ import annotations

from typing import Callable, Dict, List, Optional, Sequence

import torch

_COLUMNS_PER_PASS = 32


def batched_output_grads(output: torch.Tensor, targets: List[torch.Tensor],
                         vectors: torch.Tensor) -> List[Optional[torch.Tensor]]:
    """Backpropagate each of ``vectors`` from ``output`` to ``targets``; results ``[K, *target.shape]``."""
    pieces: List[List[Optional[torch.Tensor]]] = []
    for start in range(0, vectors.shape[0], _COLUMNS_PER_PASS):
        chunk = vectors[start:start + _COLUMNS_PER_PASS]
        if chunk.shape[0] == 1:  # one draw (the default): a plain pass is cheaper than a batched one
            grads = torch.autograd.grad(output, targets, grad_outputs=chunk[0], retain_graph=True,
                                        allow_unused=True)
            pieces.append([None if g is None else g.unsqueeze(0) for g in grads])
            continue
        try:
            grads = torch.autograd.grad(output, targets, grad_outputs=chunk, retain_graph=True,
                                        allow_unused=True, is_grads_batched=True)
        except RuntimeError:
            # Some operations have no batching rule: fall back to one pass per vector.
            per_vector = [torch.autograd.grad(output, targets, grad_outputs=v, retain_graph=True,
                                              allow_unused=True) for v in chunk]
            grads = [None if parts[0] is None else torch.stack(parts)
                     for parts in zip(*per_vector)]
        pieces.append(list(grads))
    if len(pieces) == 1:  # one chunk: no copy (a layer's output gradients are as large as its activations)
        return pieces[0]
    return [None if per_target[0] is None else torch.cat(per_target) for per_target in zip(*pieces)]


def _targets_below(root, target_ids) -> Dict[int, bool]:
    """``{id(node): whether a target node lies strictly below it}`` for the nodes reachable from ``root``."""
    below: Dict[int, Optional[bool]] = {}
    alive = []  # keeps the node objects (and so their ids) alive during the walk
    stack = [(root, False)]
    while stack:
        node, finished = stack.pop()
        children = [child for child, _ in node.next_functions if child is not None]
        if finished:
            below[id(node)] = any(id(c) in target_ids or below[id(c)] for c in children)
            continue
        if id(node) in below:
            continue
        below[id(node)] = None  # being walked; a DAG never meets it again below itself
        alive.append(node)
        stack.append((node, True))
        stack.extend((child, False) for child in children if id(child) not in below)
    return below


def stream_output_grads(output: torch.Tensor, edges: Sequence, vector: torch.Tensor,
                        consume: Callable[[int, torch.Tensor], None]) -> None:
    """``consume(i, grad)`` for each gradient edge ``edges[i]`` that ``output`` reaches, along ``vector``.

    ``edges`` are ``torch.autograd.graph.GradientEdge`` objects of the layer outputs.
    """
    nodes = [edge.node for edge in edges]
    root = output.grad_fn
    below = _targets_below(root, {id(node) for node in nodes}) if root is not None else {}
    lowest = [i for i, node in enumerate(nodes) if not below.get(id(node))]
    requested = set(lowest)
    handles = []
    for i, edge in enumerate(edges):
        if i not in requested:
            def pre_hook(grad_outputs, i=i, slot=edge.output_nr):
                if grad_outputs[slot] is not None:
                    consume(i, grad_outputs[slot])
                return None
            handles.append(edge.node.register_prehook(pre_hook))
    try:
        grads = torch.autograd.grad(output, [edges[i] for i in lowest], grad_outputs=vector, retain_graph=True,
                                    allow_unused=True)
    finally:
        for handle in handles:
            handle.remove()
    for i, grad in zip(lowest, grads):
        if grad is not None:
            consume(i, grad)
