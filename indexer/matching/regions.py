"""Region descriptors: a few overlapping parts of every indexed image, each embedded on its own.

A query that shows a small part of a photo (a crop keeping a fifth of it) is far, in descriptor
space, from the whole photo: the photo's vector describes everything else too. It is close to the
vector of a part of the photo of about its own extent. So every indexed image also gets the vectors
of a `grid` x `grid` layout of squares-by-proportion, each REGION_SIDE of the image's width and
height, evenly spaced from edge to edge (3 x 3 of halves: stride a quarter, every point of the image
inside at least one region, the centre inside four).

They serve one purpose: a query whose best candidate did not verify (indexer/matching/query.py, second round)
also searches them, and the images whose parts it finds are verified like any other candidate
(indexer/matching/rerank.py). A region never raises a score on its own: a candidate found only through a
region keeps its place only when verification confirms it, and not through the mirrored query, which
would pair one wing of a symmetric subject with the other.

Measured on the quality benchmark's store (benchmarks/results/quality.md; /tmp experiments by the
same code path): the crop's original among the first 15 candidates, for crops keeping a fifth of the
photo, 0.33 by the whole-image descriptor alone, 0.94 adding 3 x 3 halves (2 x 2 halves plus the
centre: 0.72); crops' recall@1 0.833 -> 0.914.

What they cost: grid**2 more vectors per image, embedded from the small copy at index time (the
encoder runs grid**2 + 1 times per image instead of once) and stored in the catalog under their own
key (`region_key`); the generation holds them in a flat inner-product index (`REGIONS_FILE`) of
grid**2 times the images' vectors.
"""

from __future__ import annotations

import logging
import time
from pathlib import Path
from typing import Sequence

import numpy as np
from PIL import Image

from ..core.errors import ImageReadError
from ..core.pause import pause_at
from ..core.progress import Progress
from ..storage.store import Store

log = logging.getLogger(__name__)

REGION_SIDE = 0.5  # each region's width and height, as a fraction of the image's
_BLOCK = 64  # images embedded (and committed) at a time


def region_boxes(grid: int) -> list[tuple[float, float, float, float]]:
    """(left, top, right, bottom) of each region as fractions of the image, row by row: `grid`
    positions per axis, REGION_SIDE wide, from one edge to the other."""
    if grid < 1:
        return []
    starts = [0.0] if grid == 1 else [k * (1.0 - REGION_SIDE) / (grid - 1) for k in range(grid)]
    return [(x, y, x + REGION_SIDE, y + REGION_SIDE) for y in starts for x in starts]


def cut_regions(image: Image.Image, grid: int) -> list[Image.Image]:
    """The image's regions (`region_boxes`) as images, at the image's own resolution."""
    w, h = image.size

    def span(lo: float, hi: float, side: int) -> tuple[int, int]:
        # At least one pixel: an image a few pixels wide would otherwise give empty parts, which no
        # encoder can take.
        a = min(round(lo * side), max(side - 1, 0))
        return a, max(round(hi * side), a + 1)

    out = []
    for l, t, r, b in region_boxes(grid):
        (x0, x1), (y0, y1) = span(l, r, w), span(t, b, h)
        out.append(image.crop((x0, y0, x1, y1)))
    return out


def region_key(model: str, grid: int) -> str:
    """The catalog's model key of a model's region vectors (one row per content, grid**2 vectors long)."""
    return f"{model}/regions-{grid}"


def embed_missing_regions(store: Store, model_dir: Path, grid: int, *, progress: bool | None = None) -> dict:
    """Region vectors for every readable content that has none under this model and grid, read from
    its small copy, committed a block at a time (a killed run keeps whole blocks)."""
    from ..learning.embed import embed_images
    from ..learning.runtime import load_encoder
    from ..reading.images import read_image

    encoder, card = load_encoder(model_dir, store.settings.runtime)
    version, size = card["version"], int(card["image_size"])
    key = region_key(version, grid)
    rows = store.catalog.contents_missing_vectors(key)
    started = time.monotonic()
    done, failed = 0, 0
    with Progress(len(rows), "region descriptors", enabled=progress, unit="image") as bar:
        for start in range(0, len(rows), _BLOCK):
            block, crops = [], []
            for row in rows[start:start + _BLOCK]:
                try:
                    # Decoded as for the image's own vector (longest side twice the input): a half region
                    # is then about the input's size.
                    image = read_image(store.pixels_path(row), max_side=2 * size)[0]
                except (ImageReadError, OSError) as exc:
                    log.warning("no region vectors for %s: %s", row["relpath"], exc)
                    failed += 1
                    continue
                block.append(row["content_id"])
                crops.extend(cut_regions(image, grid))
            if block:
                xr = embed_images(encoder, crops, size)
                store.catalog.put_vectors(key, block, xr.reshape(len(block), -1))
                pause_at("embed")
            done += len(block)
            bar.update(min(_BLOCK, len(rows) - start))
    seconds = time.monotonic() - started
    if rows:
        log.info("region vectors (%d x %d) for %d images in %.1f s", grid, grid, done, seconds)
    return {"grid": grid, "embedded": done, "failed": failed, "seconds": round(seconds, 3)}


def region_rows(store: Store, model: str, grid: int, file_ids: np.ndarray | None,
                 whitening) -> tuple[np.ndarray, np.ndarray]:
    """(parent file id per region vector, whitened region vectors) of `file_ids` (None: every file)."""
    key, cells = region_key(model, grid), grid * grid
    if file_ids is None:
        blocks = list(store.catalog.iter_file_vectors(key))
    else:
        found = store.catalog.file_vectors(file_ids.tolist(), key)
        ids = np.array(sorted(found), np.int64)
        blocks = [(ids, np.stack([found[i] for i in ids.tolist()]))] if len(ids) else []
    parents, vectors = [], []
    for ids, flat in blocks:
        parents.append(np.repeat(ids, cells))
        vectors.append(whitening.apply(flat.reshape(len(ids) * cells, -1)))
    if not parents:
        return np.zeros(0, np.int64), np.zeros((0, 0), np.float32)
    return np.concatenate(parents), np.ascontiguousarray(np.concatenate(vectors), dtype=np.float32)


def build_region_index(store: Store, model: str, grid: int, whitening):
    """`region_index` of every file's region vectors; None when no file has them."""
    parents, xr = region_rows(store, model, grid, None, whitening)
    return region_index(parents, xr) if len(parents) else None


def region_index(parents: np.ndarray, xr: np.ndarray):
    """A flat inner-product FAISS index of region vectors `xr`, each under its file's id (`parents`;
    IDMap allows one id for many vectors, and removes them all together)."""
    import faiss

    index = faiss.IndexIDMap(faiss.IndexFlatIP(xr.shape[1]))
    index.add_with_ids(np.ascontiguousarray(xr, dtype=np.float32), np.ascontiguousarray(parents, dtype=np.int64))
    return index


def update_region_index(index, store: Store, model: str, grid: int, whitening, *,
                        removed: np.ndarray, added: np.ndarray) -> None:
    """The region index of an incremental build: `removed` files' regions out, `added` files' in."""
    import faiss

    if len(removed):
        index.remove_ids(faiss.IDSelectorBatch(np.ascontiguousarray(removed, dtype=np.int64)))
    if len(added):
        parents, xr = region_rows(store, model, grid, np.asarray(added, np.int64), whitening)
        if len(parents):
            index.add_with_ids(xr, parents)


def region_candidates(index, xq: np.ndarray, n: int, excludes: Sequence[set], grid: int
                      ) -> list[list[tuple[float, int]]]:
    """Per query row, (similarity, file id) of up to `n` files, each with its best region's similarity,
    best first: the files whose regions are among the query's n * grid**2 nearest region vectors (enough
    for n files even when every region of the nearest files ranks first)."""
    # Excluded files' regions take places in the search too: ask for theirs as well.
    wanted = min(int(index.ntotal), (n + max((len(e) for e in excludes), default=0)) * grid * grid)
    if wanted == 0:
        return [[] for _ in range(len(xq))]
    D, I = index.search(np.ascontiguousarray(xq, dtype=np.float32), wanted)
    out = []
    for d_row, i_row, exclude in zip(D, I, excludes):
        best: dict[int, float] = {}
        for d, i in zip(d_row.tolist(), i_row.tolist()):
            if i >= 0 and i not in exclude and i not in best:  # best first: a file's first hit is its best
                best[i] = d
        out.append(sorted(((d, i) for i, d in best.items()), key=lambda t: -t[0])[:n])
    return out


def regions_for_generation(store: Store, model: str, whitening, *, prev=None,
                           removed: np.ndarray | None = None, added: np.ndarray | None = None):
    """(region index or None, grid) of a generation being built under the store's `region_grid`: the
    previous generation's index updated (`removed` and `added` file ids) when it has one of the same
    grid, else built from the catalog's region vectors."""
    grid = int(store.settings.region_grid)
    if not grid:
        return None, 0
    if prev is not None and removed is not None and added is not None:
        index, prev_grid = prev.load_regions()
        if index is not None and prev_grid == grid:
            update_region_index(index, store, model, grid, whitening, removed=removed, added=added)
            return index, grid
    return build_region_index(store, model, grid, whitening), grid


def regions_extra(index, grid: int, meta: dict, extra: dict) -> None:
    """Record a generation's region index: its file in `extra` and its size in `meta`."""
    import faiss

    from .generations import REGIONS_FILE

    if index is None:
        meta.pop("regions", None)
        return
    extra[REGIONS_FILE] = faiss.serialize_index(index).tobytes()
    meta["regions"] = {"grid": grid, "vectors": int(index.ntotal)}
