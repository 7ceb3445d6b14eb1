"""New material against the archive: for each file, is it a copy of a catalogued file, similar to one, or new?

`nearsight check PATH ...` asks the question an archive asks before it takes in a donation, and an ML
team asks of its test images against its training set. Nothing about the answer touches the store: no
file is catalogued, embedded into it, indexed or moved.

Each file gets one verdict:

- ``copy``: its bytes are a catalogued file's (found by content hash before any decoding), or its best
  match is a duplicate by the generation's query verdict (the same call `similar` makes);
- ``similar``: its best match is not a duplicate but scores at or above the generation's similar tier
  (on the descriptor's scale, as groups use it);
- ``new``: nothing in the archive comes that close;
- ``unreadable``: it cannot be read as an image (the reason is given).
"""

from __future__ import annotations

import logging
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Iterator, Sequence

from .core.errors import ImageReadError, NotFoundError
from .core.fsutil import hash_bytes, hash_file
from .matching.query import read_query
from .reading.images import read_image

log = logging.getLogger(__name__)

VERDICTS = ("copy", "similar", "new", "unreadable")
BATCH = 32  # files decoded and searched together


@dataclass
class CheckAnswer:
    path: str  # as given
    verdict: str  # one of VERDICTS
    match: dict | None = None  # id, path, similarity, probability, evidence
    error: dict | None = None  # for unreadable files: reason and message

    def to_dict(self) -> dict:
        return asdict(self)


def _match(result: dict) -> dict:
    return {"id": result["id"], "path": result["path"], "similarity": result["similarity"],
            "probability": result.get("probability"), "evidence": result.get("evidence")}


def _verdict(result: dict | None, similar_threshold: float) -> str:
    if result is None:
        return "new"
    if result["duplicate"]:
        return "copy"
    return "similar" if result["descriptor_similarity"] >= similar_threshold else "new"


def check_files(searcher, paths: Sequence[str], *, threshold: float | None = None,
                catalog=None) -> Iterator[CheckAnswer]:
    """One CheckAnswer per path, in order. `searcher`: the store's indexer.matching.query.Searcher; `threshold`
    replaces the query verdict as `similar --threshold` does; `catalog`: the connection to read with (a
    thread's own in the service; default the store's)."""
    def content_hash(given: str) -> str | None:
        return hash_file(Path(given)) if Path(given).is_file() else None

    def pixels(given: str):
        return read_query(given, 2 * searcher.size)

    yield from _check(searcher, list(paths), list(paths), content_hash, pixels, threshold, catalog)


def check_uploads(searcher, uploads: Sequence[tuple[str, bytes]], *, threshold: float | None = None,
                  max_pixels: int | None = None, catalog=None) -> Iterator[CheckAnswer]:
    """`check_files` for images given as (name, bytes), e.g. the files of an HTTP request: the same hash
    before decoding, the same reading (`images.read_image`, with `max_pixels` checked on the header) and the
    same verdicts. Each answer's `path` is the name given."""
    def pixels(data: bytes):
        return read_image(data, max_side=2 * searcher.size, max_pixels=max_pixels)[0]

    yield from _check(searcher, [name for name, _ in uploads], [data for _, data in uploads], hash_bytes, pixels,
                      threshold, catalog)


def _check(searcher, labels: list[str], sources: list, content_hash, pixels, threshold, catalog) -> Iterator[CheckAnswer]:
    catalog = catalog if catalog is not None else searcher.store.catalog
    similar_threshold = float(searcher.generation.threshold("similar")) if searcher.generation else searcher.threshold
    for start in range(0, len(sources), BATCH):
        block = sources[start:start + BATCH]
        names = labels[start:start + BATCH]
        answers: dict[int, CheckAnswer] = {}
        images, rows = [], []
        for row, (given, source) in enumerate(zip(names, block)):
            try:
                digest = content_hash(source)
                same = catalog.present_files_with_hash(digest) if digest else []
                if same:  # the same bytes: no need to decode
                    answers[row] = CheckAnswer(given, "copy", {**same[0], "similarity": 1.0, "probability": 1.0,
                                                               "evidence": {"same_bytes": True}})
                    continue
                images.append(pixels(source))
                rows.append(row)
            except (ImageReadError, NotFoundError) as exc:
                answers[row] = CheckAnswer(given, "unreadable", error=exc.to_dict())
            except OSError as exc:
                answers[row] = CheckAnswer(given, "unreadable", error={"error": "unreadable", "reason": "io-error",
                                                                        "message": f"{exc.strerror or exc}: {given}"})
        if images:
            found = searcher.neighbours(searcher.vectors_for_images(images), 1, threshold, images=images,
                                        catalog=catalog)
            for row, results in zip(rows, found):
                best = results[0] if results else None
                verdict = _verdict(best, similar_threshold)
                answers[row] = CheckAnswer(names[row], verdict, None if verdict == "new" else _match(best))
        for row in range(len(block)):
            yield answers[row]
