"""How well the same-frame check (indexer/matching/aligned.py) separates copies from look-alikes.

Every query of a quality run (`bench_quality.py`'s work folder) is answered with the check off, and each of its
first 5 results is compared with the query by the check: its band correlation, when both frames have the same
shape. A result that is the query's original is a copy; every other result is a look-alike the descriptor put
near the query (mostly neighbouring tiles of the same photograph, the hardest kind). Reported: how high the
look-alikes reach, and which share of the copies that keypoints did not confirm each threshold confirms.

    .venv/bin/python benchmarks/bench_aligned.py --work /tmp/nearsight-bench-quality --out benchmarks/results/aligned.md
"""

from __future__ import annotations

import argparse
import json
import logging
import sys
import time
from collections import Counter
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from benchmarks import bench_quality  # noqa: E402
from benchmarks.bench_quality import _store  # noqa: E402
from benchmarks.common import machine  # noqa: E402

THRESHOLDS = (0.6, 0.65, 0.7, 0.75, 0.8, 0.85, 0.9)
TOP = 5


def measure(work: Path, store_name: str) -> list[dict]:
    """One row per (query, result among its first TOP): whether the result is the query's original, whether
    keypoints confirmed it, and the band correlation (None: frames of different shapes, or a flat picture)."""
    from nearsight.indexer.matching.aligned import Frame, candidate_frames, correlation
    from nearsight.indexer.matching.query import Searcher
    from nearsight.indexer.reading.images import read_image

    saved = json.loads((work / "queries.json").read_text())
    names, records = saved["names"], saved["records"]
    bench_quality.SETTINGS_OVERRIDES["same_frame"] = "false"
    rows = []
    with _store(work / "stores" / store_name, create=False) as store:
        searcher = Searcher(store)
        for start in range(0, len(records), 64):
            block = records[start:start + 64]
            images = [read_image(r["path"], max_side=2 * searcher.size)[0] for r in block]
            answers = searcher.neighbours(searcher.vectors_for_images(images), TOP, images=images)
            sources = store.catalog.pixel_sources({h["id"] for results in answers for h in results})
            frames = candidate_frames({i: str(store.pixels_path(row)) for i, row in sources.items()})
            for record, image, results in zip(block, images, answers):
                query = Frame(image)
                original = names[record["gt"]] if record["gt"] >= 0 else None
                for rank, hit in enumerate(results):
                    c = correlation(query, frames[hit["id"]]) if hit["id"] in frames else None
                    rows.append({"family": record["family"], "transform": record["transform"], "rank": rank,
                                 "copy": Path(hit["path"]).name == original,
                                 "keypoints": bool((hit.get("evidence") or {}).get("verified")), "correlation": c})
    return rows


def report(rows: list[dict], command: str, seconds: float) -> str:
    wrong = np.array([r["correlation"] for r in rows if not r["copy"] and r["correlation"] is not None])
    missed = [r for r in rows if r["copy"] and not r["keypoints"]]
    compared = [r for r in missed if r["correlation"] is not None]
    lines = ["# The same-frame check: copies against look-alikes", "", f"Machine: {machine()}", "",
             f"Command: `{command}` ({seconds / 60:.0f} minutes).", "",
             __doc__.split("\n\n")[1].replace("\n", " "), "",
             f"Pairs: {len(rows)} (query, result) pairs; {sum(r['copy'] for r in rows)} of them a copy, "
             f"{len(missed)} copies that keypoints did not confirm ({len(compared)} with frames of the same shape); "
             f"{len(wrong)} look-alikes with frames of the same shape.", "",
             "| look-alikes' correlation | value |", "|---|---:|"]
    for q in (0.99, 0.999):
        lines.append(f"| {q} quantile | {np.quantile(wrong, q):.3f} |")
    lines += [f"| highest | {wrong.max():.3f} |", "",
              "| threshold | look-alikes reaching it | copies keypoints missed that it confirms | by family |",
              "|---:|---:|---:|---|"]
    for t in THRESHOLDS:
        hits = [r for r in compared if r["correlation"] >= t]
        families = ", ".join(f"{f} {n}" for f, n in Counter(r["family"] for r in hits).most_common())
        lines.append(f"| {t:.2f} | {int((wrong >= t).sum())} | {len(hits)} of {len(missed)} "
                     f"({len(hits) / max(len(missed), 1):.2f}) | {families} |")
    return "\n".join(lines) + "\n"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--work", type=Path, default=Path("/tmp/nearsight-bench-quality"))
    parser.add_argument("--store", default="train-10min")
    parser.add_argument("--out", type=Path, required=True)
    args = parser.parse_args()
    logging.basicConfig(level=logging.WARNING)
    started = time.monotonic()
    rows = measure(args.work, args.store)
    command = f".venv/bin/python benchmarks/bench_aligned.py --work {args.work} --out {args.out}"
    args.out.write_text(report(rows, command, time.monotonic() - started))
    print(args.out.read_text())


if __name__ == "__main__":
    main()
