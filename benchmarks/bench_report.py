"""The HTML report at scale: a synthetic generation of 10,000 groups of three files each.

Writes the groups' contact sheets (indexer/acting/report.py) with a small JPEG for every file, and states the wall
time, the process's peak resident memory before and after (ru_maxrss), the page's size and its picture
folder's. A report must stay a page a browser opens at once: the pictures are files beside it.

    .venv/bin/python benchmarks/bench_report.py --groups 10000

Writes benchmarks/results/report.md unless --out says otherwise.
"""

from __future__ import annotations

import argparse
import io
import resource
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from benchmarks.common import machine, write_report  # noqa: E402


def synthetic_groups(n: int, size: int = 3):
    """`n` near-duplicate groups of `size` files, with paths and metadata like an archive's."""
    from nearsight.indexer.matching.groups import Group, ImageMeta, Member

    groups = []
    for g in range(n):
        members = []
        for k in range(size):
            ident = g * size + k + 1
            meta = ImageMeta(path=f"/archive/scans-{g // 500:03d}/roll-{g:05d}/frame-{k}.jpg",
                             content_hash=f"{ident:064x}", width=1600 - 100 * k, height=1200 - 75 * k,
                             file_size=900_000 - 50_000 * k, format="JPEG", mtime=1.6e9 + ident)
            members.append(Member(ident, "near-duplicate", 1.0 if k == 0 else 0.97, meta))
        groups.append(Group(f"{g:016x}", "near-duplicate", members[0].id, members))
    return groups


def thumbnail_bytes() -> bytes:
    from PIL import Image

    out = io.BytesIO()
    Image.effect_noise((160, 120), 40).convert("RGB").save(out, "JPEG", quality=80)
    return out.getvalue()


def rss_mib() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # KiB on Linux


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--groups", type=int, default=10_000)
    ap.add_argument("--out", type=Path, default=ROOT / "benchmarks/results/report.md")
    args = ap.parse_args()
    from nearsight.indexer.acting.report import write_html_report

    groups = synthetic_groups(args.groups)
    picture = thumbnail_bytes()
    before = rss_mib()
    with tempfile.TemporaryDirectory() as tmp:
        page = Path(tmp) / "groups.html"
        started = time.perf_counter()
        write_html_report(groups, page, thumbnail=lambda ident: picture, title="nearsight: duplicate groups",
                          summary={"store": "/archive/nearsight-store"})
        seconds = time.perf_counter() - started
        after = rss_mib()
        folder = page.parent / "groups_files"
        pictures = list(folder.iterdir())
        page_mib = page.stat().st_size / 2**20
        folder_mib = sum(p.stat().st_size for p in pictures) / 2**20
    files = sum(g.size for g in groups)
    lines = [
        "# The HTML report at scale",
        "",
        f"Machine: {machine()}. Command: `.venv/bin/python benchmarks/bench_report.py --groups {args.groups}`.",
        "",
        f"A synthetic generation of {args.groups:,} near-duplicate groups of 3 files ({files:,} files), each file "
        f"shown by a {len(picture):,}-byte JPEG thumbnail.",
        "",
        "| measure | value |",
        "|---|---:|",
        f"| wall time to write the page and its pictures | {seconds:.1f} s ({seconds / files * 1000:.2f} ms a file) |",
        f"| peak resident memory before, after | {before:.0f} MiB, {after:.0f} MiB |",
        f"| the page (HTML) | {page_mib:.1f} MiB |",
        f"| its picture folder | {len(pictures):,} files, {folder_mib:.1f} MiB |",
        "",
        "The page holds no picture itself: it opens as text, and the browser loads each thumbnail as it scrolls "
        "near it (`loading=lazy`).",
        "",
    ]
    return write_report(args.out, lines)


if __name__ == "__main__":
    sys.exit(main())
