"""The embedding stage over a store: vectors for every readable content that lacks one.

Vectors are stored in the catalog per model version and keyed by content, so a
renamed, moved or byte-identical file is never embedded again, and each block
is committed on its own: a killed run resumes without repeating finished work.
"""

from __future__ import annotations

import logging
import time
from pathlib import Path

from ..core.pause import pause_at
from ..core.progress import Progress
from ..learning.embed import iter_embed_files
from ..storage.store import Store

log = logging.getLogger(__name__)


def _local_blocks(paths, model_dir: Path, encoder, size: int, batch_size: int, workers: int):
    yield from iter_embed_files(paths, encoder, size, batch_size=batch_size, workers=workers)


def _cluster_blocks(paths, model_dir: Path, address: str, runtime: str):
    """The same (ids, vectors, errors) blocks, computed by a Dask cluster's workers (cluster.py)."""
    from .cluster import dask_client, iter_on_client

    with dask_client(address) as client:
        for r in iter_on_client(client, [str(p) for p in paths], model_dir, runtime=runtime):
            yield r.start + r.ok, r.vectors, {r.start + k: v for k, v in r.errors.items()}


def embed_missing(store: Store, model_dir: Path, *, batch_size: int = 64, workers: int = 0,
                  progress: bool | None = None, cluster: str | None = None) -> dict:
    """Embed what the current model has not seen; returns counts and timing. With `cluster` (a Dask
    scheduler address) the workers embed and this process alone writes the catalog."""
    from ..learning.runtime import load_encoder

    encoder, card = load_encoder(model_dir, store.settings.runtime)
    version, size = card["version"], int(card["image_size"])
    rows = store.catalog.contents_missing_vectors(version)
    started = time.monotonic()
    paths = [store.pixels_path(row) for row in rows]
    embedded, failed = 0, {}
    with Progress(len(paths), "embed", enabled=progress) as bar:
        blocks = (_cluster_blocks(paths, model_dir, cluster, store.settings.runtime) if cluster
                  else _local_blocks(paths, model_dir, encoder, size, batch_size, workers))
        for ids, xb, errors in blocks:
            if len(ids):
                store.catalog.put_vectors(version, [rows[i]["content_id"] for i in ids], xb)
                pause_at("embed")
            embedded += len(ids)
            for i, reason in errors.items():
                failed[str(Path(rows[i]["root"]) / rows[i]["relpath"])] = reason
            bar.update(len(ids) + len(errors))
    seconds = time.monotonic() - started
    log.info("embedded %d contents with %s in %.1f s (%d failed)", embedded, version, seconds, len(failed))
    return {"model": version, "embedded": embedded, "embed_failed": failed, "seconds": round(seconds, 3)}
