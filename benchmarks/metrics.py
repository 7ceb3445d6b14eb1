"""Retrieval metrics for the copy-detection benchmark, over pooled (query, reference, score) predictions.

Each query has at most one true reference (`gt[q]`, or -1 when its original is not in the
index). Every system hands in its predictions as three parallel arrays `q`, `r`, `score`
(typically its top 10 per query).

* `micro_ap`: micro average precision as defined for the DISC21 image similarity challenge
  (Douze et al. 2021, "The 2021 Image Similarity Dataset and Challenge", section on metrics):
  the predictions of all queries are pooled and ranked by score, precision and recall are
  computed along that single ranking, recall is normalised by the number of queries that
  have a true match in the index, and the AP is the area under that curve as a step sum
  sum_k (R_k - R_(k-1)) * P_k. Predictions for queries without a match can only cost
  precision. Tied scores are taken together (the curve is evaluated only where the score
  changes, as scikit-learn's `average_precision_score` does), so the order of tied
  predictions, frequent with pHash's 65 possible scores, cannot change the result.
* `recall_at_precision`: the largest recall on that curve at a point whose precision is at
  least the target (the operating point of DISC21's evaluation code, from memory).
* `recall_at_1`: the share of queries with a match whose top prediction is the true
  reference; a tie at the top counts 1/m when the truth is one of m tied predictions
  (the expected value under a random order).
* `verdict`: realised precision and recall of a fixed threshold (a "duplicate" verdict).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class Predictions:
    """Parallel arrays: query index, reference index, score (higher = more similar)."""

    q: np.ndarray
    r: np.ndarray
    score: np.ndarray

    def __post_init__(self):
        if not (len(self.q) == len(self.r) == len(self.score)):
            raise ValueError("q, r and score must have the same length")

    def subset(self, mask: np.ndarray) -> "Predictions":
        return Predictions(self.q[mask], self.r[mask], self.score[mask])

    def correct(self, gt: np.ndarray) -> np.ndarray:
        """Boolean per prediction: is r the query's true reference?"""
        return np.asarray(gt)[self.q] == self.r


def _positives(gt: np.ndarray, queries: np.ndarray | None) -> int:
    gt = np.asarray(gt)
    if queries is None:
        return int((gt >= 0).sum())
    return int((gt[np.asarray(queries)] >= 0).sum())


def pr_curve(pred: Predictions, gt: np.ndarray, queries: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(precision, recall, threshold) at each distinct score, highest score first.

    `queries` restricts the recall denominator to those queries (default: all of `gt`)."""
    n_pos = _positives(gt, queries)
    if len(pred.score) == 0 or n_pos == 0:
        return np.zeros(0), np.zeros(0), np.zeros(0)
    order = np.argsort(-pred.score, kind="stable")
    scores = pred.score[order]
    hits = pred.correct(gt)[order]
    tp = np.cumsum(hits)
    last_of_tie = np.r_[scores[1:] != scores[:-1], True]  # evaluate where the score changes
    k = np.flatnonzero(last_of_tie)
    precision = tp[k] / (k + 1)
    recall = tp[k] / n_pos
    return precision, recall, scores[k]


def micro_ap(pred: Predictions, gt: np.ndarray, queries: np.ndarray | None = None) -> float:
    """DISC21 micro average precision (see the module docstring)."""
    precision, recall, _ = pr_curve(pred, gt, queries)
    if len(recall) == 0:
        return float("nan")
    return float(np.sum(np.diff(np.r_[0.0, recall]) * precision))


def recall_at_precision(pred: Predictions, gt: np.ndarray, target: float, queries: np.ndarray | None = None) -> float:
    """Largest recall at a point of the pooled curve with precision >= target (0 if none)."""
    precision, recall, _ = pr_curve(pred, gt, queries)
    ok = precision >= target
    return float(recall[ok].max()) if ok.any() else 0.0


def recall_at_1(pred: Predictions, gt: np.ndarray, queries: np.ndarray | None = None) -> float:
    """Share of queries with a match whose top prediction is the match (ties at the top: 1/m)."""
    gt = np.asarray(gt)
    wanted = np.arange(len(gt)) if queries is None else np.asarray(queries)
    wanted = wanted[gt[wanted] >= 0]
    if len(wanted) == 0:
        return float("nan")
    keep = np.isin(pred.q, wanted)
    q, r, s = pred.q[keep], pred.r[keep], pred.score[keep]
    if len(q) == 0:
        return 0.0
    top = np.full(len(gt), -np.inf)
    np.maximum.at(top, q, s)
    at_top = s == top[q]
    tied = np.bincount(q[at_top], minlength=len(gt))
    hit = at_top & (gt[q] == r)
    credit = np.zeros(len(gt))
    np.add.at(credit, q[hit], 1.0 / tied[q[hit]])
    return float(credit[wanted].sum() / len(wanted))


def verdict(pred: Predictions, gt: np.ndarray, threshold: float, queries: np.ndarray | None = None) -> dict:
    """Realised precision / recall of calling every prediction with score >= threshold a duplicate.

    Precision: correct calls / calls. Recall: queries whose true reference was called / queries
    with a match (a query's truth can be called at most once)."""
    called = pred.score >= threshold
    correct = called & pred.correct(gt)
    n_pos = _positives(gt, queries)
    n_called, n_correct = int(called.sum()), int(correct.sum())
    return {"threshold": float(threshold), "called": n_called, "correct": n_correct, "positives": n_pos,
            "precision": n_correct / n_called if n_called else float("nan"),
            "recall": n_correct / n_pos if n_pos else float("nan")}


def flagged_queries(pred: Predictions, gt: np.ndarray, threshold: float) -> dict:
    """Of the queries with no match in the index, how many got any prediction >= threshold (a false flag
    per query: the error a user asking "is this a copy of my image?" meets)."""
    no_match = np.flatnonzero(gt < 0)
    flagged = np.unique(pred.q[(pred.score >= threshold) & (gt[pred.q] < 0)])
    return {"queries": int(len(no_match)), "flagged": int(len(flagged)),
            "rate": len(flagged) / len(no_match) if len(no_match) else float("nan")}


def top_k(scores: np.ndarray, k: int, q_offset: int = 0) -> Predictions:
    """The k highest scores of each row of a (queries x references) matrix, as Predictions."""
    k = min(k, scores.shape[1])
    idx = np.argpartition(-scores, k - 1, axis=1)[:, :k]
    rows = np.repeat(np.arange(scores.shape[0]), k)
    return Predictions(rows + q_offset, idx.ravel().astype(np.int64), scores[rows, idx.ravel()].astype(np.float64))


def concat(parts: list[Predictions]) -> Predictions:
    if not parts:
        return Predictions(np.zeros(0, np.int64), np.zeros(0, np.int64), np.zeros(0))
    return Predictions(np.concatenate([p.q for p in parts]), np.concatenate([p.r for p in parts]),
                       np.concatenate([p.score for p in parts]))
