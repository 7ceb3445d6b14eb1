"""Asked pairs for groups: each indexed file asked as a query, its strongly verified results kept.

`pair_verify.py` checks each file's few closest neighbours by descriptor. A copy that the descriptor
puts further away (a mirrored or quarter-turned copy, a tight crop, a copy inside a border, one under a
large overlay) is not among them, though `similar` finds it: the query path also searches the query's
other views and the region descriptors, and verifies more candidates (query.py). So, when groups are
built, every indexed file is asked through that same path (`Searcher.neighbours`, with its stored vector
and region vectors and its small copy: no encoder pass for the query as given), and a result that geometric
verification confirms on at least `query_verdict.strong_inliers()` inliers joins the candidate pairs at the
score of a verified pair (`pair_verify.verified_score`). Grouping treats it like any other near-duplicate
pair, and a group still needs every pair of its members to pass, so nothing chains.

Why strongly verified, and not "called a copy by the query verdict": the verdict's threshold is calibrated
per query, and asking every file of a collection that holds no copies would still call about that share of
them (the quality benchmark's photos: 4 of 1,107 files, neighbouring tiles of one photograph); verified
look-alikes matched on 12-18 inliers, real copies on 22 or more (query_verdict.STRONG_INLIER_FACTOR). On the
quality benchmark's photos with 832 planted copies, the groups' pairs went from recall 0.730 to 0.808 at
the same precision (0.999), on the demo archive from 0.921 to 0.988, with no new wrong pair in either and
none in the collection without copies (benchmarks/bench_groups.py).

Cost: one query per indexed file, about 13 ms on 2 cores (1,939 files in 26 s), most of it for the files
whose best candidate does not verify (they are searched through their other views).
"""

from __future__ import annotations

import logging
import time

import numpy as np

from . import index as faiss_index
from .pair_verify import verified_score
from .query_verdict import strongly_verified

log = logging.getLogger(__name__)

ASKED = 5  # results asked per file
BATCH = 32  # files asked together (their small copies are decoded per batch: memory stays bounded)


def asked_pairs(searcher, q_ids: np.ndarray, xq: np.ndarray, *, t_near: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(a, b, sims) of the strongly verified results of the indexed files `q_ids` (their rows `xq` in the
    searcher's space), each asked without itself; sims are verified scores, never below `t_near`."""
    from .query_verdict import DESCRIPTOR_KEY, own_images, strong_inliers

    started = time.monotonic()
    strong = strong_inliers()
    q_ids = np.asarray(q_ids, np.int64)
    a, b, sims = [], [], []
    asked = 0
    for start in range(0, len(q_ids), BATCH):
        rows = list(range(start, min(start + BATCH, len(q_ids))))
        own = own_images(searcher, q_ids, rows, 2 * searcher.size)  # (row, file id, small copy); unreadable: out
        if not own:
            continue
        parts = searcher.own_parts([i for _, i, _ in own])
        answers = searcher.neighbours(np.stack([xq[r] for r, _, _ in own]), ASKED, excludes=[{i} for _, i, _ in own],
                                      images=[im for _, _, im in own], parts=[parts.get(i) for _, i, _ in own])
        asked += len(own)
        for (_, i, _), results in zip(own, answers):
            for r in results:
                if strongly_verified(r, strong):
                    a.append(i)
                    b.append(int(r["id"]))
                    sims.append(verified_score(float(r[DESCRIPTOR_KEY]), t_near))
    log.info("asked %d files: %d strongly verified results in %.1f s", asked, len(a), time.monotonic() - started)
    return faiss_index.canonical_pairs(np.asarray(a, np.int64), np.asarray(b, np.int64), np.asarray(sims, np.float32))
