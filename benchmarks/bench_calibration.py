"""Is the calibration honest, and does query-adaptive score normalisation help?

On the demo archive (planted truth in truth.json), in one run:

* for several target precisions: the threshold `nearsight calibrate` chooses, its
  estimated precision and recall (with Wilson intervals), and the precision and recall
  realised on every pair of the archive against the planted truth;
* raw cosine against query-adaptive normalisation as published with the DISC21
  challenge (Douze et al. 2021, "The 2021 Image Similarity Dataset and Challenge":
  subtract a multiple of the similarity to the k-th neighbour in a background set),
  made symmetric for pairs: s'(a, b) = s(a, b) - beta * (bg_a + bg_b) / 2, with the
  background being the rest of the collection. Compared by average precision over all
  pairs (sklearn.metrics.average_precision_score) and by recall at the precision
  targets, each threshold picked with the truth (an oracle: this measures the scores,
  not the calibration).

    .venv/bin/python benchmarks/bench_calibration.py --demo nearsight-demo
(run `nearsight demo --out nearsight-demo` first, or pass --make to generate it here).
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from benchmarks.common import machine  # noqa: E402
from nearsight.indexer.building.refresh import make_generation  # noqa: E402
from nearsight.indexer.calibration.calibrate import CalibrationConfig  # noqa: E402
from nearsight.indexer.demo import demo_pairs, pair_quality, run_demo  # noqa: E402
from nearsight.indexer.matching.generations import require_current  # noqa: E402
from nearsight.indexer.core.settings import load_settings  # noqa: E402
from nearsight.indexer.storage.store import Store  # noqa: E402

TARGETS = (0.95, 0.99, 0.995)


def oracle_recall(scores: np.ndarray, y: np.ndarray, target: float) -> tuple[float, float]:
    """(threshold, recall) at the lowest threshold from which realised precision stays >= target."""
    order = np.argsort(-scores)
    tp = np.cumsum(y[order])
    precision = tp / np.arange(1, len(order) + 1)
    ok = np.minimum.accumulate(precision) >= target  # a prefix: precision at every higher cut too
    k = int(ok.sum())
    if k == 0:
        return float("nan"), 0.0
    return float(scores[order][k - 1]), float(tp[k - 1] / y.sum())


def normalised(sims: np.ndarray, pairs: np.ndarray, k: int, beta: float) -> np.ndarray:
    s = sims.copy()
    np.fill_diagonal(s, -np.inf)
    bg = -np.sort(-s, axis=1)[:, k - 1]  # similarity to the k-th neighbour
    a, b = pairs
    return sims[a, b] - beta * (bg[a] + bg[b]) / 2


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--demo", type=Path, default=Path("nearsight-demo"), help="demo folder (truth.json + store/)")
    parser.add_argument("--make", action="store_true", help="generate the demo (3 minutes of training) if missing")
    parser.add_argument("--out", type=Path, default=Path(__file__).parent / "results" / "calibration.md")
    args = parser.parse_args()
    if not (args.demo / "truth.json").is_file():
        if not args.make:
            sys.exit(f"no demo at {args.demo}: run `nearsight demo --out {args.demo}` or pass --make")
        run_demo(args.demo, train_minutes=3.0, progress=False)
    truth = json.loads((args.demo / "truth.json").read_text())
    rows = []
    with Store.open(args.demo / "store", settings=load_settings(environ={})) as store:
        for target in TARGETS:
            started = time.monotonic()
            make_generation(store, build="recalibrate", calibration=CalibrationConfig(target_precision=target))
            seconds = time.monotonic() - started
            cal = require_current(store).load_calibration()
            near = cal["tiers"]["near"]
            at = near["at_threshold"]
            real = pair_quality(store, truth, {"near": near["threshold"]})["near"]
            rows.append((target, near["threshold"], near["target_met"], at, real, seconds))
        sims, pairs, y = demo_pairs(store, truth)
        model = require_current(store).meta["model"]
    from sklearn.metrics import average_precision_score

    raw = sims[pairs[0], pairs[1]]
    variants = [("raw cosine", raw)] + [(f"DISC21 normalised, k={k}, beta={beta}", normalised(sims, pairs, k, beta))
                                        for k in (5, 10) for beta in (0.5, 1.0)]
    lines = [
        "# Calibration honesty and score normalisation on the demo archive",
        "",
        f"Machine: {machine()}",
        f"Demo: {args.demo} ({len(truth['images'])} files, seed {truth['seed']}), model {model}; "
        f"{int(y.sum())} planted duplicate pairs among {len(y):,} pairs with different bytes.",
        "",
        "Command: `.venv/bin/python benchmarks/bench_calibration.py --demo " + str(args.demo) + "`",
        "",
        "## Estimated (calibration) against realised (planted truth), near-duplicate tier",
        "",
        "| target | threshold | target met | estimated precision (95 % CI) | estimated recall (95 % CI) | "
        "called, estimated | realised precision | realised recall | called, realised | seconds |",
        "|---|---|---|---|---|---|---|---|---|---|",
    ]
    for target, t, met, at, real, seconds in rows:
        p_lo, p_hi = at["precision_interval"]
        r_lo, r_hi = at["recall_interval"]
        lines.append(f"| {target} | {t:.3f} | {'yes' if met else 'no'} | {at['precision']:.3f} ({p_lo:.3f}-{p_hi:.3f}) | "
                     f"{at['recall']:.3f} ({r_lo:.3f}-{r_hi:.3f}) | {at['called_pairs']:.0f} | {real['precision']:.3f} | "
                     f"{real['recall']:.3f} | {real['called']} | {seconds:.1f} |")
    lines += [
        "",
        "Estimated recall is measured on synthetic edits of the collection's own images; the demo's planted "
        "copies include stronger edits, so realised recall is lower.",
        "",
        "## Raw cosine against query-adaptive normalisation (thresholds picked with the truth)",
        "",
        "| scores | average precision | " + " | ".join(f"recall at precision {t}" for t in TARGETS) + " |",
        "|---|---|" + "---|" * len(TARGETS),
    ]
    for name, scores in variants:
        recalls = [oracle_recall(scores, y, t)[1] for t in TARGETS]
        lines.append(f"| {name} | {average_precision_score(y, scores):.4f} | " + " | ".join(f"{r:.3f}" for r in recalls) + " |")
    args.out.parent.mkdir(parents=True, exist_ok=True)
    args.out.write_text("\n".join(lines) + "\n")
    print("\n".join(lines))


if __name__ == "__main__":
    main()
