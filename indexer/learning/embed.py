"""The one entry for vectors: images or files in, L2-normalised float32 rows out.

`embed_files` is a pure function of (files, model): it can run on any machine
with a copy of the model folder, and a bad file is reported, never fatal.
Memory stays bounded: files are decoded and embedded one block at a time.
"""

from __future__ import annotations

import logging
import multiprocessing
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Iterator, Sequence

import numpy as np
from PIL import Image

from ..core.errors import ImageReadError, UsageError
from ..reading.images import read_image

log = logging.getLogger(__name__)

# Decoding the longest side to twice the input size leaves the shorter side of
# typical photos (aspect up to 2:1) at or above `size` before the centre crop.
DEFAULT_DECODE_FACTOR = 2.0
_DECODE_BLOCK = 512  # files handed to the decoding pool at a time; bounds memory


@dataclass
class EmbedResult:
    """`vectors[k]` is the embedding of `paths[ok[k]]`; `errors` maps a failed index to its reason."""

    vectors: np.ndarray
    ok: list[int] = field(default_factory=list)
    errors: dict[int, str] = field(default_factory=dict)


def embed_images(encoder, images: Sequence[Image.Image], size: int, batch_size: int = 64) -> np.ndarray:
    """Embed PIL images with the encoder (a PyTorch `Encoder`, run in eval mode, or a runtime.OnnxEncoder);
    returns (n, dim) float32, unit rows. Both see the same pixels (indexer/learning/inputs.py)."""
    if batch_size < 1:
        raise UsageError(f"batch size must be >= 1, got {batch_size}")
    from .runtime import OnnxEncoder

    if isinstance(encoder, OnnxEncoder):
        from .inputs import square_batch, standardised

        blocks = [encoder(standardised(square_batch(images[start : start + batch_size], size)))
                  for start in range(0, len(images), batch_size)]
        blocks = [b / np.maximum(np.linalg.norm(b, axis=1, keepdims=True), 1e-12) for b in blocks]
    else:
        blocks = _embed_torch(encoder, images, size, batch_size)
    if not blocks:
        return np.zeros((0, _output_dim(encoder)), dtype=np.float32)
    return np.ascontiguousarray(np.concatenate(blocks), dtype=np.float32)


def _embed_torch(encoder, images: Sequence[Image.Image], size: int, batch_size: int) -> list[np.ndarray]:
    import torch

    from .encoder import preprocess

    was_training = encoder.training
    encoder.eval()
    blocks = []
    try:
        with torch.inference_mode():
            for start in range(0, len(images), batch_size):
                x = preprocess(images[start : start + batch_size], size)
                blocks.append(torch.nn.functional.normalize(encoder(x), dim=1).numpy())
    finally:
        encoder.train(was_training)
    return blocks


def _output_dim(encoder) -> int:
    return int(getattr(encoder, "out_dim", getattr(encoder, "dim", 0)))


def _decode_one(job: tuple[int, str, int | None]) -> tuple[int, np.ndarray | None, str | None]:
    """Worker: decode one file to an RGB uint8 array, or return the reason it failed."""
    index, path, max_side = job
    try:
        im, _info = read_image(path, max_side)
        return index, np.asarray(im, dtype=np.uint8), None
    except ImageReadError as exc:
        return index, None, str(exc)
    except Exception as exc:  # a decoder bug must cost one file, not the run
        return index, None, f"unexpected: {type(exc).__name__}: {exc}"


def decode_files(
    paths: Sequence[Path | str], max_side: int | None, workers: int = 0
) -> Iterator[tuple[int, np.ndarray | None, str | None]]:
    """Yield (index, RGB uint8 array or None, error or None) for every path, in order.

    With workers > 1 the files are decoded by a process pool, a block at a time.
    """
    jobs = [(i, str(p), max_side) for i, p in enumerate(paths)]
    if workers <= 1:
        yield from map(_decode_one, jobs)
        return
    # spawn, not fork: the parent may hold threads (ONNX Runtime's, the verification pool's) whose locks a forked
    # child would inherit held; a test run that asked queries before training hung there for 10 minutes.
    with multiprocessing.get_context("spawn").Pool(workers) as pool:
        for start in range(0, len(jobs), _DECODE_BLOCK):
            yield from pool.imap(_decode_one, jobs[start : start + _DECODE_BLOCK], chunksize=8)


def iter_embed_files(
    paths: Sequence[Path | str],
    encoder,
    size: int,
    *,
    batch_size: int = 64,
    max_side: int | None = None,
    workers: int = 0,
) -> Iterator[tuple[np.ndarray, np.ndarray, dict[int, str]]]:
    """Yield blocks (ids, vectors, errors): ids index `paths`, errors holds the failures met in the block."""
    max_side = max_side or round(DEFAULT_DECODE_FACTOR * size)
    ids: list[int] = []
    images: list[Image.Image] = []
    errors: dict[int, str] = {}
    for index, pixels, error in decode_files(paths, max_side, workers):
        if error is not None:
            log.warning("skipping %s: %s", paths[index], error)
            errors[index] = error
        else:
            ids.append(index)
            images.append(Image.fromarray(pixels))
        if len(images) >= batch_size:
            yield np.asarray(ids, dtype=np.int64), embed_images(encoder, images, size, batch_size), errors
            ids, images, errors = [], [], {}
    if images or errors:
        yield np.asarray(ids, dtype=np.int64), embed_images(encoder, images, size, batch_size), errors


def embed_files(
    paths: Sequence[Path | str], model_dir: Path, *, batch_size: int = 64, max_side: int | None = None, workers: int = 0,
    runtime: str = "auto",
) -> EmbedResult:
    """Embed files with the model in `model_dir` (run as `runtime.load_encoder` chooses); unreadable files land
    in `errors`, never abort."""
    from .runtime import load_encoder

    encoder, card = load_encoder(model_dir, runtime)
    size = int(card["image_size"])
    started = time.monotonic()
    blocks, ok, errors = [], [], {}
    for ids, vectors, block_errors in iter_embed_files(
        paths, encoder, size, batch_size=batch_size, max_side=max_side, workers=workers
    ):
        ok.extend(int(i) for i in ids)
        blocks.append(vectors)
        errors.update(block_errors)
    vectors = np.concatenate(blocks) if blocks else np.zeros((0, _output_dim(encoder)), dtype=np.float32)
    elapsed = time.monotonic() - started
    log.info("embedded %d files (%d unreadable) in %.1f s", len(ok), len(errors), elapsed)
    return EmbedResult(vectors=vectors, ok=ok, errors=errors)
