"""Losses for learning embeddings, each as in its paper.

- `nt_xent`: NT-Xent / InfoNCE, SimCLR eq. 1 (Chen et al. 2020), with optional
  extra negatives from a queue of earlier embeddings (He et al. 2020, MoCo).
- `koleo`: the Kozachenko-Leonenko entropy regulariser (Sablayrolles et al. 2019).
- `margin_contrastive`: the pair loss of Hadsell, Chopra, LeCun (2006).
- `triplet` and `triplet_hard`: the triplet loss (Schroff et al. 2015), the
  latter with "batch hard" mining (common practice; Hermans et al. 2017).

Embeddings are rows of (n, d) tensors; `nt_xent` and `koleo` L2-normalise
their inputs, the distance losses use them as given.
"""

from __future__ import annotations

import torch
import torch.nn.functional as F

from ..core.errors import UsageError


def nt_xent(z1: torch.Tensor, z2: torch.Tensor, temperature: float, queue: torch.Tensor | None = None) -> torch.Tensor:
    """Mean NT-Xent over the 2N views of N positive pairs (z1[k], z2[k]).

    For view i with partner j: l(i, j) = -log( exp(s_ij / t) / sum_{k != i} exp(s_ik / t) ),
    s = cosine similarity; the other 2N - 2 views in the batch are negatives.
    Rows of `queue` (K, d) are added to every denominator as further negatives.
    """
    if z1.shape != z2.shape or z1.dim() != 2:
        raise UsageError(f"nt_xent needs two (N, d) tensors of equal shape, got {tuple(z1.shape)} and {tuple(z2.shape)}")
    if temperature <= 0:
        raise UsageError(f"temperature must be > 0, got {temperature}")
    n = z1.shape[0]
    z = F.normalize(torch.cat([z1, z2]), dim=1)
    logits = z @ z.T / temperature
    logits = logits.masked_fill(torch.eye(2 * n, dtype=torch.bool, device=z.device), float("-inf"))
    if queue is not None and queue.numel() > 0:
        logits = torch.cat([logits, z @ F.normalize(queue, dim=1).T / temperature], dim=1)
    targets = torch.cat([torch.arange(n, 2 * n), torch.arange(0, n)]).to(z.device)
    return F.cross_entropy(logits, targets)


def koleo(z: torch.Tensor, eps: float = 1e-8) -> torch.Tensor:
    """KoLeo regulariser: -mean_i log(min_{j != i} ||z_i - z_j||) on L2-normalised rows.

    Minimising it spreads the embeddings uniformly over the sphere (Sablayrolles et
    al. 2019, "Spreading vectors for similarity search"). `eps` keeps log finite.
    """
    if z.dim() != 2 or z.shape[0] < 2:
        raise UsageError(f"koleo needs an (n >= 2, d) tensor, got {tuple(z.shape)}")
    z = F.normalize(z, dim=1)
    with torch.no_grad():  # the nearest neighbour is chosen, then its distance is differentiated
        sim = z @ z.T
        sim.fill_diagonal_(-2.0)
        nearest = sim.argmax(dim=1)
    distances = (z - z[nearest]).norm(dim=1)
    return -torch.log(distances + eps).mean()


def margin_contrastive(x1: torch.Tensor, x2: torch.Tensor, y: torch.Tensor, margin: float = 1.0) -> torch.Tensor:
    """Contrastive pair loss, Hadsell, Chopra, LeCun (2006), eq. 4, averaged over pairs.

    y = 0 marks a similar pair, y = 1 a dissimilar one (the paper's convention):
    L = (1 - y) * 1/2 * D^2 + y * 1/2 * max(0, m - D)^2,  D = ||x1 - x2||_2.
    """
    if x1.shape != x2.shape or y.shape != x1.shape[:1]:
        raise UsageError("margin_contrastive needs x1, x2 of shape (n, d) and y of shape (n,)")
    y = y.to(x1.dtype)
    d = _pair_distance(x1, x2)
    return ((1 - y) * 0.5 * d.pow(2) + y * 0.5 * F.relu(margin - d).pow(2)).mean()


def _pair_distance(x1: torch.Tensor, x2: torch.Tensor, eps: float = 1e-12) -> torch.Tensor:
    # sqrt of a clamped square: finite gradient when two rows coincide.
    return (x1 - x2).pow(2).sum(dim=1).clamp(min=eps).sqrt()


def triplet(anchor: torch.Tensor, positive: torch.Tensor, negative: torch.Tensor, margin: float = 0.2) -> torch.Tensor:
    """Triplet loss (Schroff et al. 2015): mean of max(0, ||a - p|| - ||a - n|| + margin).

    Distances are `F.pairwise_distance` (which adds eps = 1e-6 to the difference),
    the same as `torch.nn.TripletMarginLoss`.
    """
    d_ap = F.pairwise_distance(anchor, positive)
    d_an = F.pairwise_distance(anchor, negative)
    return F.relu(d_ap - d_an + margin).mean()


def pairwise_distances(x: torch.Tensor) -> torch.Tensor:
    """Euclidean distance matrix (n, n) with a finite gradient on the diagonal."""
    sq = x.pow(2).sum(dim=1)
    d2 = (sq[:, None] + sq[None, :] - 2 * x @ x.T).clamp(min=1e-12)
    return d2.sqrt()


def batch_hard_indices(distances: torch.Tensor, labels: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor]:
    """For each anchor: the farthest same-label row, the nearest other-label row, and whether both exist."""
    same = labels[:, None] == labels[None, :]
    eye = torch.eye(len(labels), dtype=torch.bool, device=labels.device)
    pos_mask, neg_mask = same & ~eye, ~same
    hardest_pos = distances.masked_fill(~pos_mask, float("-inf")).argmax(dim=1)
    hardest_neg = distances.masked_fill(~neg_mask, float("inf")).argmin(dim=1)
    valid = pos_mask.any(dim=1) & neg_mask.any(dim=1)
    return hardest_pos, hardest_neg, valid


def triplet_hard(embeddings: torch.Tensor, labels: torch.Tensor, margin: float = 0.2) -> torch.Tensor:
    """Batch-hard triplet loss: each anchor with its hardest positive and hardest negative in the batch.

    Anchors lacking a positive or a negative in the batch are left out; if none
    remains the loss is zero (still connected to the graph).
    """
    if embeddings.dim() != 2 or labels.shape != embeddings.shape[:1]:
        raise UsageError("triplet_hard needs embeddings (n, d) and labels (n,)")
    d = pairwise_distances(embeddings)
    pos, neg, valid = batch_hard_indices(d.detach(), labels)
    rows = torch.arange(len(labels), device=embeddings.device)
    losses = F.relu(d[rows, pos] - d[rows, neg] + margin)
    if not valid.any():
        return embeddings.sum() * 0.0
    return losses[valid].mean()
