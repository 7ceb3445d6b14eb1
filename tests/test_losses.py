"""Losses checked against their papers' equations (re-implemented in NumPy) and reference libraries."""

import numpy as np
import pytest
import torch
from scipy.spatial.distance import cdist

from nearsight.indexer.core.errors import UsageError
from nearsight.indexer.learning.losses import batch_hard_indices, koleo, margin_contrastive, nt_xent, triplet, triplet_hard


def _unit(x: np.ndarray) -> np.ndarray:
    return x / np.linalg.norm(x, axis=1, keepdims=True)


def numpy_nt_xent(z1: np.ndarray, z2: np.ndarray, t: float, queue: np.ndarray | None = None) -> float:
    """SimCLR eq. (1) (Chen et al. 2020), written loop by loop from the paper.

    l(i, j) = -log exp(sim(z_i, z_j)/t) / sum_{k=1..2N, k != i} exp(sim(z_i, z_k)/t);
    L = 1/(2N) sum_k [l(2k-1, 2k) + l(2k, 2k-1)]. Views 2k-1 and 2k are interleaved here.
    Queue rows, when given, are extra terms in every denominator (He et al. 2020, MoCo eq. 1).
    """
    n = len(z1)
    z = np.empty((2 * n, z1.shape[1]))
    z[0::2], z[1::2] = z1, z2
    z = _unit(z)
    q = _unit(queue) if queue is not None else np.zeros((0, z.shape[1]))
    total = 0.0
    for i in range(2 * n):
        j = i + 1 if i % 2 == 0 else i - 1
        denominator = sum(np.exp(z[i] @ z[k] / t) for k in range(2 * n) if k != i)
        denominator += sum(np.exp(z[i] @ row / t) for row in q)
        total += -np.log(np.exp(z[i] @ z[j] / t) / denominator)
    return total / (2 * n)


@pytest.mark.parametrize("n, d, t", [(4, 8, 0.1), (7, 16, 0.5), (16, 32, 0.07)])
def test_nt_xent_matches_numpy_simclr_eq1(n, d, t):
    rng = np.random.default_rng(n * 100 + d)
    z1, z2 = rng.normal(size=(n, d)), rng.normal(size=(n, d))
    expected = numpy_nt_xent(z1, z2, t)
    got = nt_xent(torch.tensor(z1), torch.tensor(z2), t).item()
    assert got == pytest.approx(expected, rel=1e-9)


@pytest.mark.parametrize("n, t", [(3, 0.1), (8, 0.2), (16, 1.0)])
def test_nt_xent_closed_form_for_coinciding_orthogonal_views(n, t):
    # Both views of image k are the basis vector e_k, so for any view i:
    #   sim with its partner = 1, sim with itself is excluded,
    #   sim with the 2N - 2 views of the other images = 0 (orthogonal) -> each adds e^0 = 1.
    # Hence every term l(i, j) = -log( e^(1/t) / (e^(1/t) + 2N - 2) ), and so is the mean.
    z = torch.eye(n, 2 * n, dtype=torch.float64)
    expected = -np.log(np.exp(1 / t) / (np.exp(1 / t) + 2 * n - 2))
    assert nt_xent(z, z.clone(), t).item() == pytest.approx(expected, rel=1e-12)


def test_nt_xent_queue_adds_negatives_as_the_formula_says():
    rng = np.random.default_rng(7)
    z1, z2, queue = rng.normal(size=(6, 12)), rng.normal(size=(6, 12)), rng.normal(size=(20, 12))
    with_queue = nt_xent(torch.tensor(z1), torch.tensor(z2), 0.1, queue=torch.tensor(queue)).item()
    assert with_queue == pytest.approx(numpy_nt_xent(z1, z2, 0.1, queue), rel=1e-9)
    # Extra negatives only add positive terms to each denominator, so the loss grows.
    assert with_queue > nt_xent(torch.tensor(z1), torch.tensor(z2), 0.1).item()


def test_nt_xent_rejects_bad_input():
    with pytest.raises(UsageError):
        nt_xent(torch.zeros(4, 8), torch.zeros(5, 8), 0.1)
    with pytest.raises(UsageError):
        nt_xent(torch.ones(4, 8), torch.ones(4, 8), 0.0)


def test_triplet_matches_torch_triplet_margin_loss():
    # Reference: torch.nn.TripletMarginLoss (p=2, the default eps=1e-6 inside pairwise_distance).
    g = torch.Generator().manual_seed(3)
    a, p, n = (torch.randn(32, 16, generator=g) for _ in range(3))
    for margin in (0.1, 0.5, 2.0):
        expected = torch.nn.TripletMarginLoss(margin=margin)(a, p, n)
        assert triplet(a, p, n, margin).item() == pytest.approx(expected.item(), rel=1e-6)


def _brute_force_batch_hard(x: np.ndarray, labels: np.ndarray, margin: float):
    """Batch-hard mining by exhaustive search: for each anchor scan all rows (Hermans et al. 2017, from memory)."""
    d = cdist(x, x)  # SciPy Euclidean distances as the reference
    pos, neg, losses = [], [], []
    for i in range(len(x)):
        positives = [j for j in range(len(x)) if j != i and labels[j] == labels[i]]
        negatives = [j for j in range(len(x)) if labels[j] != labels[i]]
        if not positives or not negatives:
            pos.append(-1), neg.append(-1)
            continue
        hp = max(positives, key=lambda j: d[i, j])
        hn = min(negatives, key=lambda j: d[i, j])
        pos.append(hp), neg.append(hn)
        losses.append(max(0.0, d[i, hp] - d[i, hn] + margin))
    return np.array(pos), np.array(neg), float(np.mean(losses))


def test_batch_hard_picks_hardest_positive_and_negative():
    rng = np.random.default_rng(11)
    x = rng.normal(size=(24, 8))
    labels = np.repeat(np.arange(6), 4)
    labels[-1] = 99  # an anchor with no positive is left out
    exp_pos, exp_neg, exp_loss = _brute_force_batch_hard(x, labels, margin=0.3)

    xt, lt = torch.tensor(x), torch.tensor(labels)
    d = torch.cdist(xt, xt)
    pos, neg, valid = batch_hard_indices(d, lt)
    assert valid.numpy().tolist() == (exp_pos >= 0).tolist()
    assert pos.numpy()[valid.numpy()].tolist() == exp_pos[exp_pos >= 0].tolist()
    assert neg.numpy()[valid.numpy()].tolist() == exp_neg[exp_neg >= 0].tolist()
    assert triplet_hard(xt, lt, margin=0.3).item() == pytest.approx(exp_loss, rel=1e-6)


def test_triplet_hard_gradient_is_finite_with_duplicate_rows():
    x = torch.tensor([[1.0, 0.0], [1.0, 0.0], [0.0, 1.0], [0.0, 1.0]], requires_grad=True)
    triplet_hard(x, torch.tensor([0, 0, 1, 1]), margin=2.0).backward()
    assert torch.isfinite(x.grad).all()


def test_margin_contrastive_follows_hadsell_2006():
    # Hadsell, Chopra, LeCun 2006, eq. (4) (from memory): L = (1-Y) 1/2 D^2 + Y 1/2 max(0, m - D)^2,
    # Y = 0 for a similar pair, Y = 1 for a dissimilar one, D the Euclidean distance.
    x1 = torch.tensor([[0.0, 0.0], [0.0, 0.0], [0.0, 0.0], [0.0, 0.0]])
    x2 = torch.tensor([[3.0, 4.0], [0.3, 0.4], [3.0, 4.0], [0.3, 0.4]])  # D = 5, 0.5, 5, 0.5
    y = torch.tensor([0, 0, 1, 1])
    per_pair = [0.5 * 25, 0.5 * 0.25, 0.0, 0.5 * (2.0 - 0.5) ** 2]  # margin 2: pair 3 is beyond it
    for i in range(4):
        got = margin_contrastive(x1[i : i + 1], x2[i : i + 1], y[i : i + 1], margin=2.0).item()
        assert got == pytest.approx(per_pair[i], rel=1e-6)
    assert margin_contrastive(x1, x2, y, margin=2.0).item() == pytest.approx(np.mean(per_pair), rel=1e-6)


def test_margin_contrastive_matches_numpy_on_random_pairs():
    rng = np.random.default_rng(5)
    x1, x2 = rng.normal(size=(50, 6)), rng.normal(size=(50, 6))
    y = rng.integers(0, 2, size=50)
    d = np.linalg.norm(x1 - x2, axis=1)
    expected = np.mean((1 - y) * 0.5 * d**2 + y * 0.5 * np.maximum(0, 3.0 - d) ** 2)
    got = margin_contrastive(torch.tensor(x1), torch.tensor(x2), torch.tensor(y), margin=3.0).item()
    assert got == pytest.approx(expected, rel=1e-9)


def test_koleo_matches_nearest_neighbour_reference():
    # Sablayrolles et al. 2019: L_KoLeo = -1/n sum_i log(rho_i), rho_i = min_{j != i} ||f(x_i) - f(x_j)||,
    # on L2-normalised features. Reference nearest neighbours from scikit-learn.
    from sklearn.neighbors import NearestNeighbors

    rng = np.random.default_rng(2)
    x = _unit(rng.normal(size=(40, 5)))
    dist, _ = NearestNeighbors(n_neighbors=2).fit(x).kneighbors(x)  # column 0 is the point itself
    expected = -np.mean(np.log(dist[:, 1] + 1e-8))
    assert koleo(torch.tensor(x)).item() == pytest.approx(expected, rel=1e-9)


def test_koleo_rewards_spread():
    g = torch.Generator().manual_seed(0)
    spread = torch.randn(64, 8, generator=g)
    clumped = torch.randn(1, 8, generator=g) + 0.01 * torch.randn(64, 8, generator=g)
    assert koleo(spread).item() < koleo(clumped).item()
