"""Run the encoder on parts of a batch in parallel threads, one torch thread each.

Why not torch's own intra-op threads: they meet at a barrier after every
operation, so when other processes share the cores a descheduled thread stalls
the others; on a 2-core machine at a load of 4, two intra-op threads trained
2-3 times slower than one (benchmarks/results/train-views.md). Here each part
of the batch is forwarded and back-propagated in its own Python thread (torch
releases the GIL inside its kernels), and the threads meet once per step.

Each thread has a replica of the encoder that shares its Parameters (the
gradients of all parts add up in them) but keeps its own BatchNorm buffers;
`sync_buffers` averages those after each step. BatchNorm thus normalises each
part with its own statistics, as SimCLR does per device. With two parts, the
parts are exactly the batch's two view sets, so the two views of an image never
share statistics, and the sum of two gradients does not depend on which thread
finishes first: a step is deterministic.
"""

from __future__ import annotations

import copy
from concurrent.futures import ThreadPoolExecutor
from typing import Sequence

import torch


def _tie_parameters(module: torch.nn.Module, replica: torch.nn.Module) -> torch.nn.Module:
    """Make `replica` (a deep copy of `module`) use `module`'s Parameter objects; buffers stay its own."""
    params = dict(module.named_parameters())
    for prefix, sub in replica.named_modules():
        for name, _ in list(sub.named_parameters(recurse=False)):
            setattr(sub, name, params[f"{prefix}.{name}" if prefix else name])
    return replica


class SplitEncoder:
    """`parts` encoder replicas with shared Parameters, each run in its own thread."""

    def __init__(self, encoder: torch.nn.Module, parts: int):
        self.encoder = encoder
        self.replicas = [_tie_parameters(encoder, copy.deepcopy(encoder)) for _ in range(parts)]
        self.pool = ThreadPoolExecutor(parts, thread_name_prefix="split-batch")

    def forward(self, chunks: Sequence[torch.Tensor]) -> list[torch.Tensor]:
        """Raw descriptors (`forward_head(..., normalize=False)`) of chunk i by replica i, in parallel."""
        def run(i: int) -> torch.Tensor:
            replica = self.replicas[i]
            return replica.forward_head(replica.forward_features(chunks[i]), normalize=False)

        return list(self.pool.map(run, range(len(chunks))))

    def backward(self, outputs: Sequence[torch.Tensor], grads: Sequence[torch.Tensor]) -> None:
        """Back-propagate grads[i] from outputs[i] in thread i; gradients accumulate in the shared Parameters."""
        list(self.pool.map(lambda i: outputs[i].backward(grads[i]), range(len(outputs))))

    def sync_buffers(self) -> None:
        """Give the encoder and every replica the replicas' mean running statistics."""
        buffers = [dict(r.named_buffers()) for r in self.replicas]
        for name, target in self.encoder.named_buffers():
            values = [b[name] for b in buffers]
            if target.is_floating_point():
                target.copy_(torch.stack(values).mean(dim=0))
            else:  # BatchNorm's num_batches_tracked: the same count in every replica
                target.copy_(values[0])
            for value in values:
                value.copy_(target)

    def close(self) -> None:
        self.pool.shutdown(wait=True)
