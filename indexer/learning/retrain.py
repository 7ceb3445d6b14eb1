"""The retraining policy of the nightly run: `--retrain auto|never|always`.

`auto` retrains when either holds:

* the collection grew: readable distinct images now, against ``data.images_given`` of the
  current model's card, by more than the setting ``retrain_growth``;
* the held-out check dropped on new images: the check of `heldout.py` (one synthetic edit
  per original, where does the original rank?) is run twice with the current encoder,
  on n images first seen after the model was trained and on n of the model's own
  held-out originals, with the same n and the same seed, so the two recalls@1 are
  comparable (recall@1 among n originals depends on n). The drop counts when it is at
  least ``retrain_heldout_drop`` *and* a one-sided two-proportion z-test (pooled
  variance; the textbook test, as in statsmodels' ``proportions_ztest``) gives
  p < `SIGNIFICANCE`, so sampling noise on a few dozen images does not retrain.

A new model never changes what is being served: the published generation names its own
model and readers load that one, until a generation built with the new model is published.
"""

from __future__ import annotations

import logging
import math
from datetime import datetime
from pathlib import Path

import numpy as np

from ..core.errors import UsageError
from ..storage.store import Store
from .model import read_card

log = logging.getLogger(__name__)

POLICIES = ("auto", "never", "always")
MIN_CHECK_IMAGES = 16  # below this many new images the held-out comparison is not run
SIGNIFICANCE = 0.05


def recall_drop(hits_before: int, hits_now: int, n: int) -> dict:
    """The drop of recall@1 from `hits_before`/n to `hits_now`/n with its one-sided z-test
    (H1: the earlier proportion is larger; pooled variance)."""
    if n <= 0 or not (0 <= hits_before <= n and 0 <= hits_now <= n):
        raise UsageError(f"need 0 <= hits <= n and n > 0, got {hits_before}, {hits_now}, {n}")
    before, now = hits_before / n, hits_now / n
    pooled = (hits_before + hits_now) / (2 * n)
    se = math.sqrt(pooled * (1 - pooled) * 2 / n)
    z = (before - now) / se if se > 0 else 0.0
    p = 0.5 * math.erfc(z / math.sqrt(2))  # upper tail of the standard normal
    return {"before": before, "now": now, "drop": before - now, "z": z, "p_value": p}


def _created(card: dict) -> float:
    try:
        return datetime.fromisoformat(card["created"]).timestamp()
    except (KeyError, TypeError, ValueError):
        return float("inf")  # unknown: no image counts as new


def heldout_recheck(store: Store, model_dir: Path, card: dict, rows: list[dict], max_images: int) -> dict:
    """The held-out check on new images against the model's own held-out originals (see module doc)."""
    from PIL import Image

    from .embed import decode_files
    from .heldout import heldout_check
    from .model import load_model
    from .train import HELDOUT_DECODE_FACTOR

    created = _created(card)
    fresh = [store.pixels_path(r) for r in rows if (r.get("first_seen") or 0) > created]
    # As recorded (a model trained in another store reads that store's copies), else in this store (moved).
    baseline = [q for q in (Path(p) if Path(p).is_file() else store.here(p)
                            for p in card.get("data", {}).get("heldout_paths", [])) if q.is_file()]
    n = min(max_images, len(fresh), len(baseline))
    if n < MIN_CHECK_IMAGES:
        return {"skipped": f"{len(fresh)} new and {len(baseline)} held-out images: need {MIN_CHECK_IMAGES} of each",
                "n": n}
    rng = np.random.default_rng(0)
    encoder, _ = load_model(model_dir)
    size = int(card["image_size"])
    seed = int(card.get("train_config", {}).get("seed", 0))
    hits = {}
    for name, paths in (("before", baseline), ("now", fresh)):
        chosen = [paths[i] for i in np.sort(rng.choice(len(paths), n, replace=False))]
        images = [Image.fromarray(px) for _, px, err in decode_files(chosen, HELDOUT_DECODE_FACTOR * size) if err is None]
        if len(images) < MIN_CHECK_IMAGES:
            return {"skipped": f"only {len(images)} of the {name} images could be read", "n": n}
        images = images[: min(len(images), n)]
        report = heldout_check(encoder, images, seed, size)
        hits[name] = (round(report["recall_at_1"] * report["n"]), report["n"])
    n = min(hits["before"][1], hits["now"][1])
    return {"n": n, **recall_drop(min(hits["before"][0], n), min(hits["now"][0], n), n)}


def decide(store: Store, model_dir: Path, policy: str, settings) -> dict:
    """Whether this run trains a new encoder, and why (what the run summary reports)."""
    if policy not in POLICIES:
        raise UsageError(f"--retrain must be one of {', '.join(POLICIES)}, not {policy!r}")
    card = read_card(model_dir)
    rows = store.catalog.readable_contents()
    given = int(card.get("data", {}).get("images_given") or 0)
    growth = len(rows) / given - 1 if given else math.inf
    out = {"policy": policy, "retrain": policy == "always", "images": len(rows), "images_at_training": given,
           "growth": round(growth, 4) if math.isfinite(growth) else None}
    if policy != "auto":
        out["reason"] = f"policy {policy}"
        return out
    if growth > settings.retrain_growth:
        out.update(retrain=True, reason=f"the collection grew by {growth:.0%} since the model was trained "
                                        f"(retrain_growth {settings.retrain_growth:.0%})")
        return out
    check = heldout_recheck(store, model_dir, card, rows, settings.retrain_check_images)
    out["heldout"] = check
    if "skipped" in check:
        out["reason"] = f"grew {max(growth, 0):.0%}; held-out check not run ({check['skipped']})"
    elif check["drop"] >= settings.retrain_heldout_drop and check["p_value"] < SIGNIFICANCE:
        out.update(retrain=True, reason=f"held-out recall@1 fell from {check['before']:.2f} to {check['now']:.2f} "
                                        f"on {check['n']} new images (p = {check['p_value']:.3g})")
    else:
        out["reason"] = (f"grew {max(growth, 0):.0%}; held-out recall@1 {check['before']:.2f} on the model's own "
                         f"held-out images, {check['now']:.2f} on new ones")
    log.info("retrain %s: %s", "yes" if out["retrain"] else "no", out["reason"])
    return out
