"""Keep and drop lists for people who build datasets: which files to use, which are duplicates.

`nearsight groups --format keep-list` writes one path a line: every present, readable file of the store
that the quarantine plan would not move (the keepers, every file in no group, and the members that stay
for want of evidence or by a keeper rule). `--format drop-list` writes the others as CSV, one row per file
the plan would move, with the file it duplicates and the evidence. Together they hold every present,
readable file once. Nothing is moved: this is the plan (indexer/plan.py) written as lists, with the same
options (`--tier`, `--threshold`, `--precision`) and the store's keeper rules.
"""

from __future__ import annotations

import csv
from typing import IO

DROP_COLUMNS = ("path", "id", "duplicate_of", "duplicate_of_id", "tier", "evidence", "bytes", "content_hash")


def keep_and_drop(store, plan) -> tuple[list[str], list[dict]]:
    """(paths to keep, rows of files to drop) for `plan` (a plan.Plan of this store)."""
    moving = {m.file_id: m for m in plan.moves}
    present = store.catalog.image_meta()  # present, readable files
    keep = sorted(meta["path"] for ident, meta in present.items() if ident not in moving)
    drop = [{"path": m.path, "id": m.file_id, "duplicate_of": m.copy_of_path, "duplicate_of_id": m.copy_of,
             "tier": m.tier, "evidence": m.evidence, "bytes": m.size, "content_hash": m.content_hash}
            for m in sorted(moving.values(), key=lambda m: m.path)]
    return keep, drop


def write_keep_list(paths: list[str], fh: IO[str]) -> None:
    for path in paths:
        fh.write(path + "\n")


def write_drop_list(rows: list[dict], fh: IO[str]) -> None:
    writer = csv.DictWriter(fh, fieldnames=DROP_COLUMNS, lineterminator="\n")
    writer.writeheader()
    writer.writerows(rows)
