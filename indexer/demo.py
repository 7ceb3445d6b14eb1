"""`nearsight demo`: generate the invented demo archive, run the main job, compare with the truth.

The archive comes from nearsight.demo_data.generate (seeded, deterministic). The report
measures what the stages built so far find against the planted truth and says
plainly which stages are not there yet.
"""

from __future__ import annotations

import itertools
import json
import logging
import os
import shutil
from pathlib import Path

from .building.pipeline import run_index, store_status
from .core.errors import UsageError
from .storage.store import Store

log = logging.getLogger(__name__)

TRUTH_FILE = "truth.json"


def _pairs(groups) -> set[frozenset]:
    return {frozenset(p) for g in groups for p in itertools.combinations(sorted(g), 2)}


def _precision_recall(found: set, planted: set) -> tuple[float, float]:
    hits = len(found & planted)
    precision = hits / len(found) if found else 1.0
    recall = hits / len(planted) if planted else 1.0
    return precision, recall


def ensure_archive(out: Path, *, seed: int, originals: int) -> dict:
    """Generate the archive into `out` unless a previous run left one there; return its truth.

    The archive is generated beside `out` under a temporary name and renamed
    into place when complete, so an interrupted generation never leaves a
    half-made archive where the next run would look for one.
    """
    from nearsight.demo_data.generate import generate

    truth_path = out / TRUTH_FILE
    if truth_path.is_file():
        log.info("reusing the demo archive in %s", out)
        return json.loads(truth_path.read_text(encoding="utf-8"))
    if out.exists() and (not out.is_dir() or any(out.iterdir())):
        raise UsageError(f"{out} exists and holds no demo archive; choose another --out")
    out.parent.mkdir(parents=True, exist_ok=True)
    for leftover in out.parent.glob(f".{out.name}.partial-*"):
        shutil.rmtree(leftover, ignore_errors=True)  # ours: an earlier interrupted generation
    partial = out.parent / f".{out.name}.partial-{os.getpid()}"
    log.info("generating the demo archive into %s (seed %d)", out, seed)
    truth = generate(partial, seed=seed, originals=originals)
    if out.exists():
        out.rmdir()  # empty, checked above
    os.rename(partial, out)
    return truth


DUPLICATE_TIERS = ("same-bytes", "same-pixels", "near-duplicate")


def _called_pairs(groups: list[dict], relative) -> set[frozenset]:
    """Pairs the published groups call duplicates: members of a duplicate tier in one group."""
    sets = []
    for group in groups:
        sets.append([relative(m["path"]) for m in group["members"] if m["tier"] in DUPLICATE_TIERS])
    return _pairs(s for s in sets if len(s) > 1)


def demo_pairs(store: Store, truth: dict):
    """Every pair of indexed demo files with different bytes: (similarity matrix, pair rows (a, b),
    planted truth per pair), in the current generation's whitened space."""
    import numpy as np

    from .building.build import whitened_vectors
    from .matching.generations import require_current

    gen = require_current(store)
    ids, xb = whitened_vectors(store, gen.meta["model"], gen.load_whitening())
    meta = store.catalog.image_meta(ids.tolist())
    base = Path(store.catalog.sources()[0]["root"]).parent  # the demo folder holding the archive
    rel = [Path(meta[int(i)]["path"]).relative_to(base).as_posix() for i in ids]
    digest = [meta[int(i)]["content_hash"] for i in ids]
    planted = _pairs(truth["duplicate_groups"])
    a, b = np.triu_indices(len(ids), 1)
    keep = np.array([digest[i] != digest[j] for i, j in zip(a, b)], dtype=bool)
    a, b = a[keep], b[keep]
    is_planted = np.array([frozenset((rel[i], rel[j])) in planted for i, j in zip(a, b)], dtype=bool)
    return xb @ xb.T, np.stack([a, b]), is_planted


def pair_quality(store: Store, truth: dict, thresholds: dict[str, float]) -> dict:
    """Realised precision and recall of "sim >= t" over every pair of indexed demo files with
    different bytes, against the planted truth (the check the calibration's estimate must pass)."""
    sims, (a, b), is_planted = demo_pairs(store, truth)
    s = sims[a, b]
    out_figures = {}
    for name, t in thresholds.items():
        called = s >= t
        correct = int((called & is_planted).sum())
        out_figures[name] = {"threshold": t, "called": int(called.sum()), "correct": correct,
                             "planted": int(is_planted.sum()),
                             "precision": correct / max(1, int(called.sum())),
                             "recall": correct / max(1, int(is_planted.sum()))}
    return out_figures


def run_demo(out: Path, *, seed: int = 7, originals: int = 160, progress: bool | None = None,
             train_minutes: float = 3.0, train_epochs: float | None = None) -> dict:
    from .learning.train import TrainConfig
    from .matching.generations import current

    out = Path(out).absolute()
    truth = ensure_archive(out, seed=seed, originals=originals)
    archive = out / truth["root"]
    store_dir = out / "store"
    with Store.open(store_dir, create=True) as store:
        config = TrainConfig.from_options(epochs=train_epochs, minutes=None if train_epochs else train_minutes)
        summary = run_index(store, [archive], progress=progress, train_config=config)
        status = store_status(store)
        files = store.catalog.files_with_hashes()
        gen = current(store)
        groups = gen.load_groups()["groups"] if gen else []
        calibration = gen.load_calibration() if gen else None
        realised = pair_quality(store, truth, {"near": gen.meta["thresholds"]["near"]})["near"] if gen else None

    prefix = truth["root"] + "/"
    # Byte-identical files found by the scan, as pairs of paths relative to the demo folder.
    by_hash: dict[str, list[str]] = {}
    unreadable_found = set()
    for row in files:
        path = prefix + row["relpath"]
        if row["state"] == "unreadable":
            unreadable_found.add(path)
        elif row["hash"]:
            by_hash.setdefault(row["hash"], []).append(path)
    same_bytes_found = _pairs(g for g in by_hash.values() if len(g) > 1)
    # Planted byte-identical sets: an original with its exact copies.
    kind = {img["path"]: img["kind"] for img in truth["images"]}
    same_bytes_planted = _pairs(
        [p for p in group if kind[p] in ("original", "exact-copy")]
        for group in truth["duplicate_groups"]
        if any(kind[p] == "exact-copy" for p in group)
    )
    sb_precision, sb_recall = _precision_recall(same_bytes_found, same_bytes_planted)
    damaged = set(truth["damaged"])

    def relative(path: str) -> str:
        return Path(path).relative_to(out).as_posix()

    called = _called_pairs(groups, relative)
    planted = _pairs(truth["duplicate_groups"])
    lookalikes = {frozenset(p) for p in truth["lookalike_pairs"]}
    dup_precision, dup_recall = _precision_recall(called, planted)
    thresholds = gen.meta["thresholds"] if gen else None

    lines = [
        f"demo archive: {archive} ({len(truth['images'])} files, seed {truth['seed']})",
        f"store: {store_dir}",
        f"scan: {summary['new']} new, {summary['changed']} changed, {summary['unchanged']} unchanged, "
        f"{summary['unreadable']} unreadable",
        f"unreadable files: found {len(unreadable_found)}, planted {len(damaged)}, "
        f"matching {len(unreadable_found & damaged)}",
        f"same-bytes pairs: found {len(same_bytes_found)}, planted {len(same_bytes_planted)}; "
        f"precision {sb_precision:.2f}, recall {sb_recall:.2f}",
    ]
    if gen:
        lines += [
            f"generation {gen.name}: {gen.meta['indexed']} images indexed with model {gen.meta['model']}",
            f"duplicate pairs (threshold {thresholds['near']:.2f}, {thresholds['source']}): called {len(called)}, "
            f"planted {len(planted)}, correct {len(called & planted)}; "
            f"precision {dup_precision:.2f}, recall {dup_recall:.2f}",
            f"look-alike pairs wrongly called duplicates: {len(called & lookalikes)} of {len(lookalikes)}",
            f"calibration: {calibration['summary']['headline']}" if calibration else
            f"calibration: none ({gen.meta.get('calibration', {}).get('skipped', 'not run')})",
            f"descriptor scores alone, every pair at threshold {realised['threshold']:.3f} (no geometric evidence): "
            f"called {realised['called']}, "
            f"correct {realised['correct']} of {realised['planted']} planted; precision {realised['precision']:.3f}, "
            f"recall {realised['recall']:.3f}",
            f"groups: {len(groups)}; report: nearsight groups --store {store_dir} --format html",
            f"try: nearsight similar {archive / 'scans-1987'} --store {store_dir} -k 3",
        ]
    lines.append(f"next: nearsight status --store {store_dir}")
    return {
        "archive": str(archive),
        "store": str(store_dir),
        "index": summary,
        "status": status,
        "unreadable": {"found": sorted(unreadable_found), "planted": sorted(damaged)},
        "same_bytes": {"found": len(same_bytes_found), "planted": len(same_bytes_planted),
                       "precision": sb_precision, "recall": sb_recall},
        "duplicates": {"called": len(called), "planted": len(planted), "correct": len(called & planted),
                       "precision": dup_precision, "recall": dup_recall,
                       "lookalikes_called": len(called & lookalikes), "thresholds": thresholds},
        "calibration": {"headline": calibration["summary"]["headline"],
                        "near": {k: v for k, v in calibration["tiers"]["near"]["at_threshold"].items()},
                        "target_precision": calibration["tiers"]["near"]["target_precision"]} if calibration else None,
        "realised_pairs": realised,
        "lines": lines,
    }
