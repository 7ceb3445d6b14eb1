"""A person's choice of the file to keep: the review page's "keep this one", stored in the catalog.

A pick names one file. Among the files of a group, the most recent pick is the keeper before every
other keeper rule (indexer/acting/keepers.py), so the change reaches the quarantine plan, the keep list and
the review page at once, and it outlives new generations: it is the file that was chosen, whatever
group it is in next time. Removing a file's picks gives the choice back to the other rules. A pick
moves nothing by itself; only `nearsight quarantine --apply` moves files.
"""

from __future__ import annotations

import time
from pathlib import Path

from ..core.errors import NotFoundError


def pick_keeper(catalog, file_id: int, *, author: str | None = None) -> dict:
    """Record that a person chose `file_id` (a present file) as the one to keep; returns the pick."""
    file_id = int(file_id)
    now = time.time()
    with catalog.transaction() as conn:
        row = conn.execute("SELECT state FROM files WHERE id = ?", (file_id,)).fetchone()
        if row is None or row["state"] != "ok":
            raise NotFoundError(f"no present image with id {file_id}")
        cur = conn.execute("INSERT INTO keeper_picks(file_id, author, created_at) VALUES (?, ?, ?)",
                           (file_id, author, now))
    return {"id": cur.lastrowid, "file": file_id, "author": author, "created_at": now}


def drop_picks(catalog, file_id: int) -> int:
    """Forget every pick of `file_id`; returns how many there were."""
    with catalog.transaction() as conn:
        return conn.execute("DELETE FROM keeper_picks WHERE file_id = ?", (int(file_id),)).rowcount


def picks_by_path(catalog) -> dict[str, float]:
    """The full path of each picked file that is present -> the time of its latest pick."""
    rows = catalog.conn.execute(
        "SELECT s.root, f.relpath, MAX(p.created_at) AS at FROM keeper_picks p JOIN files f ON f.id = p.file_id "
        "JOIN sources s ON s.id = f.source_id WHERE f.state = 'ok' GROUP BY p.file_id")
    return {str(Path(r["root"]) / r["relpath"]): float(r["at"]) for r in rows}

