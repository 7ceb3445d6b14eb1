"""What lets a file move without a person looking: the kinds of evidence, and geometric
verification of a near-duplicate against its keeper.

A learned score says two images look alike; two different pictures of one texture (grass,
gravel, a brick wall) can look alike at 0.998. So a quarantine moves by default only:

- "same-bytes" and "same-pixels" copies of the keeper (checked by hash);
- "person-same": a person called the file and the keeper the same picture;
- "verified": a near-duplicate whose match to the keeper geometric verification confirms
  (indexer/matching/verify.py: ORB keypoints that agree under one similarity transform), on the
  store's small copies as query re-ranking reads them (indexer/matching/rerank.py);
- "unverified (opted in)": a near-duplicate that did not verify, only when asked for.

Verification results are kept in memory per pair of contents (a small copy is made from a
content's bytes, so the answer cannot change), so a service paging through a plan verifies
each pair once. Nothing is written to disk.
"""

from __future__ import annotations

import threading
from collections import OrderedDict
from typing import Sequence

from ..building.verdict_groups import PERSON, PairVerdicts
from ..matching.groups import Group, ImageMeta
from ..matching.rerank import VERIFY_SIDE, read_small
from ..matching.verify import Verification, VerifyConfig, verify_candidates
from ..storage.store import Store

VERIFIED = "verified"
UNVERIFIED = "unverified (opted in)"
EVIDENCE = ("same-bytes", "same-pixels", "person-same", VERIFIED, UNVERIFIED)
MEMO_SIZE = 50_000  # pairs of contents; a Verification is a few hundred bytes


class _Memo:
    """A bounded, thread-safe map from (keeper content, member content) to a Verification."""

    def __init__(self, size: int):
        self.size = size
        self._items: OrderedDict = OrderedDict()
        self._lock = threading.Lock()

    def get(self, key) -> Verification | None:
        with self._lock:
            if key in self._items:
                self._items.move_to_end(key)
            return self._items.get(key)

    def put(self, key, value: Verification) -> None:
        with self._lock:
            self._items[key] = value
            while len(self._items) > self.size:
                self._items.popitem(last=False)


_MEMO = _Memo(MEMO_SIZE)


def verify_against_keeper(store: Store, keeper: int, members: Sequence[int]) -> dict[int, Verification]:
    """Per member id: does geometric verification confirm it is a copy of (part of) the keeper?

    Both are read from the store's small copies (their files when there is none). A file that cannot
    be read gets verified=False with the reason, and is tried again next time."""
    rows = store.catalog.pixel_sources([keeper, *members])
    if keeper not in rows:
        return {m: Verification(False, reason="the keeper has no pixels to compare") for m in members}
    out: dict[int, Verification] = {}
    todo = []
    for m in members:
        if m not in rows:
            out[m] = Verification(False, reason="no pixels to compare")
        elif (found := _MEMO.get((rows[keeper]["hash"], rows[m]["hash"]))) is not None:
            out[m] = found
        else:
            todo.append(m)
    if not todo:
        return out
    small = read_small({i: str(store.pixels_path(rows[i])) for i in (keeper, *todo)})
    if keeper not in small:
        return {**out, **{m: Verification(False, reason="cannot read the keeper's pixels") for m in todo}}
    readable = [m for m in todo if m in small]
    results = verify_candidates(small[keeper], [small[m] for m in readable], config=VerifyConfig(max_side=VERIFY_SIDE))
    for m, result in zip(readable, results):
        _MEMO.put((rows[keeper]["hash"], rows[m]["hash"]), result)
        out[m] = result
    out.update({m: Verification(False, reason="cannot read its pixels") for m in todo if m not in small})
    return out


def relation_to_keeper(group: Group, ident: int, keeper: int, present: dict[int, ImageMeta],
                       verdicts: PairVerdicts) -> str:
    """How a member relates to a keeper of its group: same-bytes, same-pixels (every member of a
    same-pixels group is the same picture), person-same, near-duplicate (members the grouping put
    together in a near-duplicate group; a member a person joined is only the same as the file it
    was judged with) or similar."""
    meta, kmeta = present[ident], present[keeper]
    if meta.content_hash == kmeta.content_hash:
        return "same-bytes"
    if group.tier in ("same-bytes", "same-pixels") or (meta.pixel_hash and meta.pixel_hash == kmeta.pixel_hash):
        return "same-pixels"
    if verdicts.said_same(ident, keeper):
        return PERSON
    joined = {m.id for m in group.members if m.tier == PERSON}
    if group.tier == "near-duplicate" and ident not in joined and keeper not in joined:
        return "near-duplicate"
    return "similar"


def near_duplicate_evidence(store: Store, keeper: int, members: Sequence[int], *,
                            include_unverified: bool) -> tuple[dict[int, str], dict[int, str]]:
    """(evidence of each near-duplicate that may move, reason for each one left in place)."""
    checks = verify_against_keeper(store, keeper, members) if members else {}
    evidence, left = {}, {}
    for ident, check in checks.items():
        if check.verified or include_unverified:
            evidence[ident] = VERIFIED if check.verified else UNVERIFIED
        else:
            left[ident] = f"not verified against the keeper: {check.reason}"
    return evidence, left
