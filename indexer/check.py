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

from .errors import ImageReadError, NotFoundError
from .fsutil import hash_file
from .query import read_query

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


def check_files(searcher, paths: Sequence[str], *, threshold: float | None = None) -> Iterator[CheckAnswer]:
    """One CheckAnswer per path, in order. `searcher`: the store's indexer.query.Searcher; `threshold`
    replaces the query verdict as `similar --threshold` does."""
    catalog = searcher.store.catalog
    similar_threshold = float(searcher.generation.threshold("similar")) if searcher.generation else searcher.threshold
    for start in range(0, len(paths), BATCH):
        block = list(paths[start:start + BATCH])
        answers: dict[int, CheckAnswer] = {}
        images, rows = [], []
        for row, given in enumerate(block):
            try:
                same = catalog.present_files_with_hash(hash_file(Path(given))) if Path(given).is_file() else []
                if same:  # the same bytes: no need to decode
                    answers[row] = CheckAnswer(given, "copy", {**same[0], "similarity": 1.0, "probability": 1.0,
                                                               "evidence": {"same_bytes": True}})
                    continue
                images.append(read_query(given, 2 * searcher.size))
                rows.append(row)
            except (ImageReadError, NotFoundError) as exc:
                answers[row] = CheckAnswer(given, "unreadable", error=exc.to_dict())
            except OSError as exc:
                answers[row] = CheckAnswer(given, "unreadable", error={"error": "unreadable", "reason": "io-error",
                                                                        "message": f"{exc.strerror or exc}: {given}"})
        if images:
            found = searcher.neighbours(searcher.vectors_for_images(images), 1, threshold, images=images)
            for row, results in zip(rows, found):
                best = results[0] if results else None
                verdict = _verdict(best, similar_threshold)
                answers[row] = CheckAnswer(block[row], verdict, None if verdict == "new" else _match(best))
        for row in range(len(block)):
            yield answers[row]
