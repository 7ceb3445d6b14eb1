"""Statistics behind calibration: Wilson intervals and the score-mixture fit.

The neighbours of a query that score above a floor are a mixture of real
duplicates and look-alikes. We model their similarity histogram as

    hits(s) = D * p(s) + exp(a - b * s)

where p(s) is the density of synthetic near-duplicate scores (measured, not
assumed), D the number of real duplicate hits, and the second term an
exponentially falling tail for non-duplicates (a peaks-over-threshold model
with shape 0, the usual extreme-value assumption for a light upper tail). D, a
and b are fitted by Poisson maximum likelihood on binned counts.
"""

from __future__ import annotations

from dataclasses import dataclass
from statistics import NormalDist

import numpy as np

from .errors import UsageError


def wilson_interval(k, n, confidence: float = 0.95) -> tuple[np.ndarray, np.ndarray]:
    """Wilson score interval for k successes in n trials (Wilson 1927), elementwise.

    Where n == 0 the interval is the whole [0, 1].
    """
    k = np.asarray(k, dtype=np.float64)
    n = np.asarray(n, dtype=np.float64)
    z = NormalDist().inv_cdf(0.5 + confidence / 2)  # the standard normal quantile, as scipy.stats.norm.ppf
    with np.errstate(invalid="ignore", divide="ignore"):
        p = np.where(n > 0, k / np.where(n > 0, n, 1), 0.0)
        denom = 1 + z**2 / n
        centre = (p + z**2 / (2 * n)) / denom
        half = z * np.sqrt(p * (1 - p) / n + z**2 / (4 * n**2)) / denom
        lo = np.where(n > 0, np.clip(centre - half, 0.0, 1.0), 0.0)
        hi = np.where(n > 0, np.clip(centre + half, 0.0, 1.0), 1.0)
    return lo, hi


def survival(scores: np.ndarray, grid: np.ndarray) -> np.ndarray:
    """Fraction of `scores` at or above each grid value."""
    s = np.sort(np.asarray(scores, dtype=np.float64))
    return (len(s) - np.searchsorted(s, grid, side="left")) / max(1, len(s))


def counts_at_or_above(scores: np.ndarray, grid: np.ndarray) -> np.ndarray:
    s = np.sort(np.asarray(scores, dtype=np.float64))
    return len(s) - np.searchsorted(s, grid, side="left")


@dataclass(frozen=True)
class MixtureFit:
    """hits(s) = dup_hits * p(s) + exp(a - b s) above `floor` (see the module docstring)."""

    floor: float
    dup_hits: float  # expected hits that are real duplicates (above the floor)
    a: float
    b: float
    pos_mass_above_floor: float

    def wrong_hits_above(self, t) -> np.ndarray:
        """Expected non-duplicate hits with similarity >= t (t >= floor), integrating the tail to 1."""
        t = np.maximum(np.asarray(t, dtype=np.float64), self.floor)
        if self.b <= 1e-9:
            return np.exp(min(self.a, 700.0)) * (1.0 - t)
        # (exp(a - b t) - exp(a - b)) / b = exp(a - b t + log(1 - exp(-b (1 - t))) - log b), summed in the
        # exponent so that a large a and a small b overflow nothing; at t = 1 the log is -inf and the count 0.
        with np.errstate(divide="ignore"):
            exponent = self.a - self.b * t + np.log(-np.expm1(-self.b * (1.0 - t))) - np.log(self.b)
        return np.exp(np.minimum(exponent, 700.0))

    def duplicate_probability(self, s, positive_scores) -> np.ndarray:
        """P(a hit scoring s is a real duplicate): the mixture's duplicate term over both terms at s,
        D p(s) / (D p(s) + exp(a - b s)), with p the positives' density as the fit measured it (their
        Gaussian KDE, a share `pos_mass_above_floor` of it above the floor)."""
        from scipy import stats  # imported on use: scipy.stats costs ~2 s of start-up

        s = np.asarray(s, dtype=np.float64)
        density = stats.gaussian_kde(np.asarray(positive_scores, dtype=np.float64))(s.ravel()).reshape(s.shape)
        duplicates = self.dup_hits * density / max(self.pos_mass_above_floor, 1e-12)
        wrong = np.exp(np.clip(self.a - self.b * s, -700, 700))
        total = duplicates + wrong
        return np.divide(duplicates, total, out=np.zeros_like(total), where=total > 0)

    def total_duplicate_hits(self) -> float:
        """Real duplicate hits at any similarity (those below the floor inferred from the positives)."""
        return self.dup_hits / max(self.pos_mass_above_floor, 1e-9)

    def to_dict(self) -> dict:
        return {"floor": self.floor, "dup_hits": self.dup_hits, "a": self.a, "b": self.b,
                "pos_mass_above_floor": self.pos_mass_above_floor}


def fit_mixture(hit_scores: np.ndarray, positive_scores: np.ndarray, floor: float, bins: int = 50) -> MixtureFit:
    """Fit the duplicate/non-duplicate mixture to the similarities of hits above `floor`, binned into
    `bins` equal bins up to 1 (a briefly trained encoder can pack everything into [0.99, 1])."""
    hit_scores = np.asarray(hit_scores, dtype=np.float64)
    hit_scores = hit_scores[hit_scores >= floor]
    positive_scores = np.asarray(positive_scores, dtype=np.float64)
    if len(positive_scores) < 10:
        raise UsageError(f"the mixture fit needs at least 10 positive scores, got {len(positive_scores)}")
    edges = np.linspace(floor, 1.0 + 1e-6, bins + 1)
    counts, _ = np.histogram(hit_scores, bins=edges)
    # Density of positive scores per bin, smoothed with a Gaussian KDE so that
    # empty bins between measured scores do not force a zero.
    from scipy import optimize, stats  # imported on use: scipy.stats costs ~2 s of start-up

    kde = stats.gaussian_kde(positive_scores)
    pos_bins = np.array([kde.integrate_box_1d(lo, hi) for lo, hi in zip(edges[:-1], edges[1:])])
    pos_above = float(pos_bins.sum())
    pos_bins = pos_bins / max(pos_above, 1e-12)
    centres = (edges[:-1] + edges[1:]) / 2
    widths = np.diff(edges)

    def expected(params):
        # Exponents clipped to +-300: the optimiser's trial steps can go far out, and e**300 (1e130) is
        # already absurd for a count while far from float64's overflow, so no step raises a warning.
        log_d, a, log_b = params
        tail = np.exp(np.clip(a - np.exp(np.clip(log_b, -20, 20)) * centres, -300, 300)) * widths
        return np.exp(np.clip(log_d, -300, 300)) * pos_bins + tail

    def nll(params):
        lam = np.maximum(expected(params), 1e-12)
        return float(np.sum(lam - counts * np.log(lam)))

    total = max(1.0, float(counts.sum()))
    # Start: the tail halves every tenth of the fitted range.
    b0 = np.log(2) / max((1.0 - floor) / 10, 1e-4)
    a0 = np.log(max(counts[0], 1) / widths[0]) + b0 * centres[0]
    best = None
    for frac in (0.05, 0.3, 0.7):
        start = np.array([np.log(total * frac), a0, np.log(b0)])
        res = optimize.minimize(nll, start, method="Nelder-Mead",
                                options={"maxiter": 4000, "xatol": 1e-6, "fatol": 1e-6})
        if best is None or res.fun < best.fun:
            best = res
    log_d, a, log_b = best.x
    return MixtureFit(floor=float(floor), dup_hits=float(np.exp(log_d)), a=float(a), b=float(np.exp(log_b)),
                      pos_mass_above_floor=pos_above)
