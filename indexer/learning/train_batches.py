"""Where contrastive training batches come from: decoded pictures in memory, then endless batches of view pairs.

Two ways to make views (TrainConfig.views):

- ``"batched"`` (default): pictures cached as one uint8 tensor (`view_sources.SourceBank`);
  every step makes the whole batch at once in the training process
  (`batch_views.make_view_pairs`), with per-sample parameters and hard-negative regions.
- ``"per_image"``: pictures in a packed byte cache; DataLoader worker processes make
  each view from a PIL image with `views.make_views`.

Both are seeded by (seed, step) alone, so a resumed run sees exactly the batches
the uninterrupted run would have seen.
"""

from __future__ import annotations

import signal
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from typing import Iterator, Sequence

import numpy as np
import torch
from PIL import Image
from torch.utils.data import DataLoader, Dataset

from .batch_views import make_view_pairs
from .embed import decode_files
from .view_sources import SourceBank, build_source_bank
from .views import ViewRecipe, make_views

VIEW_MODES = ("batched", "per_image")


class ImageCache:
    """Decoded images packed into one uint8 buffer (shared copy-on-write with forked workers)."""

    def __init__(self, arrays: list[np.ndarray]):
        self.shapes = np.array([a.shape for a in arrays], dtype=np.int64).reshape(-1, 3)
        sizes = self.shapes.prod(axis=1)
        self.offsets = np.concatenate([[0], np.cumsum(sizes)])
        self.pixels = np.concatenate([a.reshape(-1) for a in arrays]) if arrays else np.zeros(0, np.uint8)

    def __len__(self) -> int:
        return len(self.shapes)

    def image(self, i: int) -> Image.Image:
        flat = self.pixels[self.offsets[i] : self.offsets[i + 1]]
        return Image.fromarray(flat.reshape(self.shapes[i]))


def decode_pictures(paths: Sequence[Path], views: str, side: int,
                    workers: int) -> tuple[ImageCache | SourceBank, list[Path], dict[str, str]]:
    """Decode every path once, longest side at most `side`: (cache, readable paths, unreadable path -> reason)."""
    kept: list[Path] = []
    skipped: dict[str, str] = {}

    def readable() -> Iterator[np.ndarray]:
        for index, pixels, error in decode_files(paths, side, workers):
            if error is None:
                kept.append(paths[index])
                yield pixels
            else:
                skipped[str(paths[index])] = error

    cache = build_source_bank(readable(), len(paths), side) if views == "batched" else ImageCache(list(readable()))
    return cache, kept, skipped


def _item_seed(seed: int, epoch: int, index: int) -> int:
    return ((seed * 1_000_003 + epoch) * 10_000_019 + index) % (2**63)


class _PairViews(Dataset):
    """Item (epoch, i) -> two random views of training image i, seeded by (seed, epoch, i).

    Seeding per item makes the views independent of worker count and of resuming.
    """

    def __init__(self, cache: ImageCache, recipe: ViewRecipe, size: int, seed: int):
        self.cache, self.seed = cache, seed
        self.views = make_views(recipe, size)

    def __len__(self) -> int:
        return len(self.cache)

    def __getitem__(self, item: tuple[int, int]) -> tuple[torch.Tensor, torch.Tensor]:
        epoch, i = item
        # The CPU generator only: torch.manual_seed would also queue a lazy CUDA seeding call per item.
        torch.default_generator.manual_seed(_item_seed(self.seed, epoch, i))
        im = self.cache.image(i)
        return self.views(im), self.views(im)


class EpochBatches:
    """Endless batches of (epoch, i); the order depends only on (seed, step), so a resume picks up exactly."""

    def __init__(self, n: int, batch_size: int, seed: int, start_step: int):
        self.n, self.batch_size, self.seed, self.start_step = n, batch_size, seed, start_step
        self.steps_per_epoch = n // batch_size

    def __iter__(self) -> Iterator[list[tuple[int, int]]]:
        step = self.start_step
        while True:
            epoch, k = divmod(step, self.steps_per_epoch)
            order = torch.randperm(self.n, generator=torch.Generator().manual_seed(self.seed * 7919 + epoch))
            yield [(epoch, int(i)) for i in order[k * self.batch_size : (k + 1) * self.batch_size]]
            step += 1


def _ignore_sigint(_worker_id: int) -> None:
    """DataLoader workers leave Ctrl-C to the main process, which stops at a step boundary."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)


@dataclass(frozen=True)
class BatchPlan:
    """How many pictures a step draws, and how many of them are split into two entries (hard negatives)."""

    pictures: int
    split: int

    @property
    def entries(self) -> int:
        return self.pictures + self.split


def plan_batches(n: int, batch_size: int, hard_negative_share: float, views: str) -> BatchPlan:
    """Entries per batch stay `batch_size` (fewer if the collection is smaller); a share of them are split halves."""
    split = round(hard_negative_share * batch_size / 2) if views == "batched" else 0
    pictures = min(batch_size - split, n)
    return BatchPlan(pictures, min(split, pictures))


def view_batches(cache: ImageCache | SourceBank, plan: BatchPlan, recipe: ViewRecipe, size: int, seed: int,
                 start_step: int, workers: int,
                 threads: int = 1) -> tuple[Iterator[tuple[torch.Tensor, torch.Tensor]], EpochBatches]:
    """Endless (v1, v2) batches from `start_step` on, and the sampler (for its steps per epoch).

    Batched views render their two view sets in two threads when `threads` > 1
    (meant for one torch thread each). Close the iterator when done: it shuts
    the DataLoader's worker processes or the threads down.
    """
    sampler = EpochBatches(len(cache), plan.pictures, seed, start_step)
    if isinstance(cache, SourceBank):
        return _batched(cache, sampler, plan, recipe, size, seed, threads), sampler
    loader = DataLoader(_PairViews(cache, recipe, size, seed), batch_sampler=sampler, num_workers=workers,
                        prefetch_factor=4 if workers else None, worker_init_fn=_ignore_sigint)
    return _closing(loader), sampler


def _batched(bank: SourceBank, sampler: EpochBatches, plan: BatchPlan, recipe: ViewRecipe, size: int,
             seed: int, threads: int) -> Iterator[tuple[torch.Tensor, torch.Tensor]]:
    """With `threads` > 1, the next step's views are made in a thread while the caller trains on this
    step's: the model's threads leave a core idle in the head, the loss and the optimizer step."""
    pool = ThreadPoolExecutor(2, thread_name_prefix="views") if threads > 1 else None
    ahead = ThreadPoolExecutor(1, thread_name_prefix="next-views") if threads > 1 else None

    def make(step: int, batch: list[tuple[int, int]]) -> tuple[torch.Tensor, torch.Tensor]:
        picture_ids = torch.tensor([i for _epoch, i in batch], dtype=torch.int64)
        gen = torch.Generator().manual_seed(_item_seed(seed, step, -1))
        return make_view_pairs(bank, picture_ids, plan.split, recipe, size, gen, pool)

    steps = enumerate(sampler, start=sampler.start_step)
    try:
        if ahead is None:
            for step, batch in steps:
                yield make(step, batch)
            return
        pending = ahead.submit(make, *next(steps))
        for step, batch in steps:
            done, pending = pending, ahead.submit(make, step, batch)
            yield done.result()
    finally:
        for executor in (ahead, pool):
            if executor is not None:
                executor.shutdown(wait=True, cancel_futures=True)


def _closing(loader: DataLoader) -> Iterator[tuple[torch.Tensor, torch.Tensor]]:
    batches = iter(loader)
    try:
        yield from batches
    finally:
        del batches  # shuts the worker processes down
