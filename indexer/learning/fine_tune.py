"""Fine-tuning the encoder from a person's verdicts: pairs called the same pulled together, pairs called
different pushed apart.

Two losses: the margin contrastive loss on pairs (Hadsell, Chopra, LeCun 2006) and batch-hard triplets
(Hermans, Beyer, Leibe 2017), whose identities are the groups the "same" verdicts join
(`_components`). BatchNorm statistics stay fixed and the views are mild (`FINE_TUNE_RECIPE`): the pairs
carry the signal. The result is a new model version (`models.fine_tune_into_store` makes it current);
`nearsight train --from-verdicts FILE` reads the pairs from a verdict file (`verdicts.verdict_file_pairs`).
"""

from __future__ import annotations

import logging
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Sequence

import numpy as np
import torch
from PIL import Image
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components

from ..core.errors import UsageError
from ..core.progress import Progress
from .embed import decode_files, embed_images
from .encoder import Encoder
from .losses import margin_contrastive, triplet_hard
from .model import load_model, save_model
from .train import sample_curve
from .views import ViewRecipe, make_views

log = logging.getLogger(__name__)


# Mild views for fine-tuning: the pairs carry the signal, the views only keep the
# encoder from memorising exact pixels.
FINE_TUNE_RECIPE = ViewRecipe(
    crop_scale=(0.7, 1.0), rotate_p=0.0, jitter_p=0.3, brightness=0.2, contrast=0.2, saturation=0.2, hue=0.0,
    grayscale_p=0.0, blur_p=0.1, jpeg_p=0.2, border_p=0.0, overlay_p=0.0,
)


@dataclass(frozen=True)
class FineTuneConfig:
    loss: str = "margin"  # "margin" (Hadsell et al. 2006) or "triplet_hard" (batch-hard triplets)
    margin: float = 1.0  # on unit vectors: same pairs pulled together, different pairs pushed to >= margin
    steps: int = 200
    batch_size: int = 32  # pairs per step
    lr: float = 1e-4
    weight_decay: float = 1e-4
    seed: int = 0


@dataclass
class FineTuneResult:
    model_dir: Path
    version: str
    fine_tuned_from: str | None
    steps: int
    pairs_used: int
    pairs_skipped: int
    before: dict  # mean distance of same / different pairs before fine-tuning
    after: dict


def _components(n: int, links: list[tuple[int, int]]) -> np.ndarray:
    """Label of the connected component of each of n nodes, the pairs a person called the same as its edges
    (scipy.sparse.csgraph): the identities batch-hard triplets compare."""
    if not links:
        return np.arange(n)
    a, b = np.array(links, np.int64).T
    graph = coo_matrix((np.ones(len(a)), (a, b)), shape=(n, n))
    return connected_components(graph, directed=False)[1]


def _pair_distances(encoder: Encoder, images: list[Image.Image], pairs: np.ndarray, size: int) -> dict:
    x = embed_images(encoder, images, size)
    d = np.linalg.norm(x[pairs[:, 0]] - x[pairs[:, 1]], axis=1)
    same = pairs[:, 2] == 1
    return {"same_mean_distance": float(d[same].mean()) if same.any() else None,
            "different_mean_distance": float(d[~same].mean()) if (~same).any() else None}


def _freeze_batchnorm(module: torch.nn.Module) -> None:
    """Keep BatchNorm running statistics fixed: small verdict batches would skew them (common practice)."""
    for m in module.modules():
        if isinstance(m, torch.nn.modules.batchnorm._BatchNorm):
            m.eval()


def fine_tune_from_pairs(
    model_dir: Path,
    pairs: Sequence[tuple[Path, Path, bool]],
    *,
    out_dir: Path | None = None,
    config: FineTuneConfig = FineTuneConfig(),
    progress: bool = True,
) -> FineTuneResult:
    """Fine-tune the model in `model_dir` on verdict pairs and save it to `out_dir` (default: in place)."""
    if config.loss not in ("margin", "triplet_hard"):
        raise UsageError(f"fine-tuning loss must be 'margin' or 'triplet_hard', got {config.loss!r}")
    encoder, card = load_model(model_dir)
    size = int(card["image_size"])
    unique = sorted({str(p) for a, b, _ in pairs for p in (a, b)})
    position = {p: i for i, p in enumerate(unique)}
    images: dict[int, Image.Image] = {}
    for index, pixels, error in decode_files(unique, round(1.5 * size), workers=0):
        if error is None:
            images[index] = Image.fromarray(pixels)
        else:
            log.warning("skipping %s: %s", unique[index], error)
    rows = [(position[str(a)], position[str(b)], int(same)) for a, b, same in pairs]
    usable = np.array([r for r in rows if r[0] in images and r[1] in images], dtype=np.int64).reshape(-1, 3)
    if len(usable) == 0:
        raise UsageError("no verdict pair has two readable images")
    # Re-index to the readable images only.
    keep = sorted(images)
    remap = {old: new for new, old in enumerate(keep)}
    usable[:, 0] = [remap[i] for i in usable[:, 0]]
    usable[:, 1] = [remap[i] for i in usable[:, 1]]
    pics = [images[i] for i in keep]
    labels = torch.as_tensor(_components(len(pics), [(a, b) for a, b, s in usable if s]))

    before = _pair_distances(encoder, pics, usable, size)
    losses = _fine_tune_loop(encoder, pics, usable, labels, size, config, progress)
    after = _pair_distances(encoder, pics, usable, size)
    log.info("fine-tuned on %d pairs: same-pair distance %s -> %s, different-pair distance %s -> %s",
             len(usable), before["same_mean_distance"], after["same_mean_distance"],
             before["different_mean_distance"], after["different_mean_distance"])

    new_card = {k: v for k, v in card.items() if k not in ("version", "created", "weights_blake2b", "libraries", "format")}
    new_card["fine_tuned_from"] = card.get("version")
    new_card["fine_tune"] = {"config": asdict(config), "pairs_used": int(len(usable)),
                             "pairs_skipped": len(pairs) - int(len(usable)), "loss_curve": sample_curve(losses),
                             "before": before, "after": after}
    target = Path(out_dir) if out_dir is not None else Path(model_dir)
    version = save_model(target, encoder, new_card)
    return FineTuneResult(target, version, card.get("version"), config.steps, int(len(usable)),
                          len(pairs) - int(len(usable)), before, after)


def _fine_tune_loop(encoder: Encoder, pics: list[Image.Image], pairs: np.ndarray, labels: torch.Tensor,
                    size: int, config: FineTuneConfig, progress: bool) -> list[float]:
    torch.manual_seed(config.seed)
    rng = np.random.default_rng(config.seed)
    views = make_views(FINE_TUNE_RECIPE, size)
    optimizer = torch.optim.AdamW(encoder.parameters(), lr=config.lr, weight_decay=config.weight_decay)
    encoder.train()
    _freeze_batchnorm(encoder)
    losses = []
    with Progress(config.steps, "fine-tune", enabled=progress, unit="step", every_s=30.0) as bar:
        for _ in range(config.steps):
            batch = pairs[rng.choice(len(pairs), size=min(config.batch_size, len(pairs)), replace=False)]
            xa = torch.stack([views(pics[i]) for i in batch[:, 0]])
            xb = torch.stack([views(pics[i]) for i in batch[:, 1]])
            za, zb = encoder(torch.cat([xa, xb])).chunk(2)
            if config.loss == "margin":
                y = torch.as_tensor(1 - batch[:, 2])  # Hadsell et al.: y = 0 similar, 1 dissimilar
                loss = margin_contrastive(za, zb, y, config.margin)
            else:
                loss = triplet_hard(torch.cat([za, zb]), torch.cat([labels[batch[:, 0]], labels[batch[:, 1]]]), config.margin)
            optimizer.zero_grad(set_to_none=True)
            loss.backward()
            optimizer.step()
            losses.append(float(loss.item()))
            bar.update(1, loss=f"{losses[-1]:.3f}")
    encoder.eval()
    return losses
