"""The main job as one call: scan -> (read, embed, index, groups, calibrate, publish).

Each stage is its own module; this one only runs them in order under the
store's lock and records the run in the catalog.
"""

from __future__ import annotations

import logging
import time
from pathlib import Path
from typing import Sequence

from .scan import scan_source
from .store import Store

log = logging.getLogger(__name__)

# Keys of the run summary that add up over source folders.
COUNT_KEYS = ("seen", "new", "changed", "unchanged", "unreadable", "removed", "ignored", "same_bytes", "decoded")


def run_index(store: Store, folders: Sequence[str | Path], *, progress: bool | None = None) -> dict:
    """Scan every folder into the store and return the run summary (plain keys, JSON-ready)."""
    with store.lock():
        run_id = store.catalog.start_run("index")
        started = time.monotonic()
        try:
            per_source = [scan_source(store, folder, progress=progress).to_dict() for folder in folders]
        except BaseException as exc:
            store.catalog.finish_run(run_id, "failed", {"error": str(exc)})
            raise
        summary = {key: sum(s[key] for s in per_source) for key in COUNT_KEYS}
        reasons: dict[str, int] = {}
        for s in per_source:
            for code, n in s["unreadable_reasons"].items():
                reasons[code] = reasons.get(code, 0) + n
        summary["unreadable_reasons"] = reasons
        summary["sources"] = per_source
        summary["stages"] = {"scan": round(time.monotonic() - started, 3)}
        summary["run"] = run_id
        store.catalog.finish_run(run_id, "ok", summary)
    return summary


def store_status(store: Store) -> dict:
    """What `nearsight status` and GET /v1/status report."""
    counts = store.catalog.counts()
    last = store.catalog.last_run("index")
    return {
        "store": str(store.root),
        "schema_version": store.catalog.schema_version(),
        **counts,
        "source_folders": [s["root"] for s in store.catalog.sources()],
        "last_index_run": None
        if last is None
        else {k: last[k] for k in ("id", "status", "started_at", "finished_at")},
    }
