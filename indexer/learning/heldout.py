"""The held-out check: can the encoder find an original from an edited copy?

Each held-out original (never seen in training) gets one synthetic
near-duplicate from `edits.random_edit`. The edited copies are the queries
(xq), the originals the database (xb); we report where the true original ranks
by cosine similarity, overall and per edit kind. Ties count against the
encoder (an encoder that maps everything to one point ranks last, not first).
"""

from __future__ import annotations

from typing import Sequence

import numpy as np
import torch
from PIL import Image

from ..core.errors import UsageError
from .edits import EDIT_KINDS, random_edit
from .embed import embed_images


def _summary(ranks: np.ndarray) -> dict:
    return {
        "n": int(len(ranks)),
        "recall_at_1": float(np.mean(ranks == 1)) if len(ranks) else 0.0,
        "mean_rank": float(np.mean(ranks)) if len(ranks) else 0.0,
    }


def _learned(x: np.ndarray, encoder: torch.nn.Module) -> np.ndarray:
    d = int(getattr(encoder, "dim", x.shape[1]))
    x = x[:, :d]
    return x / np.maximum(np.linalg.norm(x, axis=1, keepdims=True), 1e-12)


def ranks_of_originals(xq: np.ndarray, xb: np.ndarray) -> np.ndarray:
    """Rank (1 = best) of xb[i] among all rows of xb for query xq[i], ties counted pessimistically."""
    sims = xq @ xb.T
    true = np.diagonal(sims)
    return (sims >= true[:, None]).sum(axis=1)


def heldout_check(
    encoder: torch.nn.Module,
    images: Sequence[Image.Image],
    seed: int,
    size: int,
    *,
    batch_size: int = 64,
    kinds: tuple[str, ...] = EDIT_KINDS,
) -> dict:
    """Recall@1 and mean rank of the original for one random edit of each held-out image."""
    if len(images) < 2:
        raise UsageError(f"the held-out check needs at least 2 images, got {len(images)}")
    rng = np.random.default_rng(seed)
    edited = [random_edit(im, rng, kinds) for im in images]
    edit_kinds = np.array([im.info["edit"] for im in edited])
    # The learned part alone: it is what training changes (a classical part, if the encoder has one, is fixed).
    xb = _learned(embed_images(encoder, images, size, batch_size), encoder)
    xq = _learned(embed_images(encoder, edited, size, batch_size), encoder)
    ranks = ranks_of_originals(xq, xb)
    report = _summary(ranks)
    report["seed"] = seed
    report["per_kind"] = {kind: _summary(ranks[edit_kinds == kind]) for kind in kinds if (edit_kinds == kind).any()}
    return report
