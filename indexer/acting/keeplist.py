"""Keep and drop lists for people who build datasets: which files to use, which are duplicates.

`nearsight groups --format keep-list` writes one path a line: every present, readable file of the store
that the quarantine plan would not move (the keepers, every file in no group, and the members that stay
for want of evidence or by a keeper rule). `--format drop-list` writes the others as CSV, one row per file
the plan would move, with the file it duplicates and the evidence. Together they hold every present,
readable file once. Nothing is moved: this is the plan (indexer/acting/plan.py) written as lists, with the same
options (`--tier`, `--threshold`, `--precision`) and the store's keeper rules.

With `--out F.parquet` either list is written as Apache Parquet instead (pyarrow, the optional extra
`nearsight[parquet]`): the keep list as one column `path`, the drop list with the CSV's columns, typed.
"""

from __future__ import annotations

import csv
from pathlib import Path
from typing import IO

from ..core.errors import UsageError

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


def write_parquet(rows: list[dict], columns: tuple[str, ...], out: Path) -> None:
    """The rows as a Parquet file, written beside `out` and renamed into place."""
    try:
        import pyarrow as pa
        import pyarrow.parquet as pq
    except ImportError:
        raise UsageError("writing Parquet needs pyarrow: pip install 'nearsight[parquet]'") from None
    whole_numbers = {"id", "duplicate_of_id", "bytes"}
    table = pa.table({c: [r[c] for r in rows] for c in columns},
                     schema=pa.schema([(c, pa.int64() if c in whole_numbers else pa.string()) for c in columns]))
    out = Path(out)
    tmp = out.with_name(f".{out.name}.partial")
    pq.write_table(table, tmp)
    tmp.replace(out)


KEEP_COLUMNS = ("path",)
