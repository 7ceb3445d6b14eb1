"""`nearsight demo`: generate the invented demo archive, run the main job, compare with the truth.

The archive comes from demo_data.generate (seeded, deterministic). The report
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

from .errors import UsageError
from .pipeline import run_index, store_status
from .store import Store

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
    from demo_data.generate import generate

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


def run_demo(out: Path, *, seed: int = 7, originals: int = 160, progress: bool | None = None) -> dict:
    out = Path(out)
    truth = ensure_archive(out, seed=seed, originals=originals)
    archive = out / truth["root"]
    store_dir = out / "store"
    with Store.open(store_dir, create=True) as store:
        summary = run_index(store, [archive], progress=progress)
        status = store_status(store)
        files = store.catalog.files_with_hashes()

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

    lines = [
        f"demo archive: {archive} ({len(truth['images'])} files, seed {truth['seed']})",
        f"store: {store_dir}",
        f"scan: {summary['new']} new, {summary['changed']} changed, {summary['unchanged']} unchanged, "
        f"{summary['unreadable']} unreadable",
        f"unreadable files: found {len(unreadable_found)}, planted {len(damaged)}, "
        f"matching {len(unreadable_found & damaged)}",
        f"same-bytes pairs: found {len(same_bytes_found)}, planted {len(same_bytes_planted)}; "
        f"precision {sb_precision:.2f}, recall {sb_recall:.2f}",
        f"planted near-duplicate groups: {len(truth['duplicate_groups'])}; look-alike pairs: {len(truth['lookalike_pairs'])} "
        "(near-duplicate search needs the encoder and index stages, not in this version yet)",
        f"next: nearsight status --store {store_dir}",
    ]
    return {
        "archive": str(archive),
        "store": str(store_dir),
        "index": summary,
        "status": status,
        "unreadable": {"found": sorted(unreadable_found), "planted": sorted(damaged)},
        "same_bytes": {"found": len(same_bytes_found), "planted": len(same_bytes_planted),
                       "precision": sb_precision, "recall": sb_recall},
        "lines": lines,
    }
