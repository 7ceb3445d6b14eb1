"""Why a group is a group: what the review page and the HTML report show beside its pictures.

For one group, as things are now (the catalog's facts, a person's verdicts and picks, the store's keeper
rules), `explain_group` gives:

- the file a quarantine would keep, and the reason in plain words (the plan's own choice,
  indexer/acting/plan.py, so the page, the report and `quarantine` never disagree);
- each member's key metadata side by side: size in pixels and bytes, format, the camera's capture time
  and make, an ICC profile, the modification time, the folder;
- what a quarantine would do with each member (keep, move and on what evidence, leave and why);
- where each member matches the keeper: geometric verification's box of the common region on both
  images (fractions of each image's width and height), or why there is none (identical files need no
  box; a pair without enough keypoints says so).

Nothing is written; verification results are the memo of indexer/acting/evidence.py.
"""

from __future__ import annotations

import time
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Callable, Sequence

import numpy as np

from ..matching.groups import Group
from .evidence import relation_to_keeper, verify_against_keeper
from .keepers import KeeperRules
from .picks import picks_by_path

# Members compared with the keeper on one page: a larger group shows its first ones (best match first).
MAX_COMPARED = 48


@dataclass
class MemberFacts:
    id: int
    tier: str  # how it relates to the keeper (groups.TIERS), as the plan judges it
    path: str
    folder: str
    width: int
    height: int
    file_size: int
    format: str
    captured: str | None
    camera: str | None
    icc: bool
    modified: str  # the file's modification time, ISO 8601 in UTC
    action: str  # keep, move, stay or changed (left alone: the file changed since the scan)
    why: str  # the keeper's reason, the move's evidence, or why it stays
    similarity: float  # cosine to the keeper (1.0 for the keeper and identical files)
    match: dict | None = None  # verified, inliers, reason, keeper_box, member_box (None for the keeper)


@dataclass
class GroupFacts:
    gid: str
    tier: str
    keeper: int
    keeper_reason: str
    picked: bool  # the keeper is a person's choice
    members: list[MemberFacts] = field(default_factory=list)  # keeper first

    def to_dict(self) -> dict:
        return asdict(self)


def _iso(seconds: float) -> str:
    return time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(seconds))


def _match(check, identical: bool) -> dict:
    if identical:
        return {"verified": True, "inliers": None, "reason": "the same picture (identical pixels)",
                "keeper_box": [0.0, 0.0, 1.0, 1.0], "member_box": [0.0, 0.0, 1.0, 1.0]}
    if check is None:
        return {"verified": False, "inliers": None, "reason": "not compared (a large group shows its first "
                f"{MAX_COMPARED})", "keeper_box": None, "member_box": None}
    keeper_box, member_box = check.boxes()
    said = check.reason.replace("query: ", "the keeper: ").replace("candidate: ", "this file: ")
    reason = said if check.verified else f"no common region was verified: {said}"
    return {"verified": bool(check.verified), "inliers": int(check.inliers), "reason": reason,
            "keeper_box": keeper_box, "member_box": member_box}


def group_explainer(store, model: str, whitening, verdicts=None) -> Callable[[Group], GroupFacts | None]:
    """`explain_group` for the groups of one generation (its `model` and `whitening`), what the review page
    and the report call: the catalog's latest verdicts (unless `verdicts` is given), the store's keeper
    rules with a person's picks, and the generation's vectors, each read once."""
    from ..building.verdict_groups import PairVerdicts, store_lookups

    verdicts = verdicts if verdicts is not None else PairVerdicts.from_rows(store.catalog.latest_verdict_files())
    vectors, _ = store_lookups(store.catalog, model, whitening)
    rules = KeeperRules.from_settings(store.settings).with_picks(picks_by_path(store.catalog))
    return lambda group: explain_group(store, group, verdicts, rules=rules, vectors=vectors)


def explain_group(store, group: Group, verdicts, *, rules: KeeperRules | None = None,
                  vectors: Callable[[Sequence[int]], dict] | None = None) -> GroupFacts | None:
    """The facts of `group` (its members as the generation has them, `verdicts` a PairVerdicts applied to
    it) as a quarantine would see them now; None when fewer than two of its files are still present.
    `rules`: the keeper rules with a person's picks in them (default: the store's, with its picks).
    `vectors(ids)` gives the generation's (whitened) vectors, for the similarity to a keeper the grouping
    did not choose; without it those similarities are the grouping's."""
    from .plan import plan_group

    if rules is None:
        rules = KeeperRules.from_settings(store.settings).with_picks(picks_by_path(store.catalog))
    planned = plan_group(store, group, verdicts, rules)
    if planned is None:
        return None
    action: dict[int, tuple[str, str]] = {planned.keeper: ("keep", planned.keeper_reason)}
    for move in planned.moves:
        action[move.file_id] = ("move", f"{move.evidence} copy of #{move.copy_of}")
    for where, items in (("stay", planned.kept), ("stay", planned.unverified), ("changed", planned.skipped)):
        for item in items:
            action[item["id"]] = (where, item["reason"])
    rows = store.catalog.file_rows(m.id for m in group.members)
    by_id = {m.id: m for m in group.members}
    keeper = by_id[planned.keeper]
    similarity = {m.id: m.similarity for m in group.members}
    if planned.keeper != group.keeper and vectors is not None:
        found = vectors([m.id for m in group.members])
        if planned.keeper in found:
            anchor = np.asarray(found[planned.keeper], np.float64)
            similarity = {i: round(float(np.dot(np.asarray(v, np.float64), anchor)), 6) for i, v in found.items()}
    others = sorted((m for m in group.members if m.id != planned.keeper and m.id in rows),
                    key=lambda m: (action.get(m.id, ("",))[0] == "changed", -similarity.get(m.id, 0.0), m.id))

    def identical(m) -> bool:
        return m.meta.content_hash == keeper.meta.content_hash or bool(
            m.meta.pixel_hash and m.meta.pixel_hash == keeper.meta.pixel_hash)

    metas = {m.id: m.meta for m in group.members}
    tiers = {m.id: relation_to_keeper(group, m.id, planned.keeper, metas, verdicts) for m in others}
    compared = [m.id for m in others if not identical(m)][:MAX_COMPARED]
    checks = verify_against_keeper(store, planned.keeper, compared) if compared else {}
    facts = GroupFacts(group.gid, group.tier, planned.keeper, planned.keeper_reason,
                       planned.keeper_path in dict(rules.picks))
    for m in [keeper, *others]:
        is_keeper = m.id == planned.keeper
        score = 1.0 if is_keeper or identical(m) else round(float(similarity.get(m.id, m.similarity)), 6)
        facts.members.append(_member(m, rows[m.id], group.tier if is_keeper else tiers[m.id],
                                     action.get(m.id, ("stay", "not in the plan")), score,
                                     None if is_keeper else _match(checks.get(m.id), identical(m))))
    return facts


def _member(m, row: dict, tier: str, action: tuple[str, str], similarity: float, match: dict | None) -> MemberFacts:
    """One member's facts: the generation's pixels and format, the catalog's file and origin as they are now."""
    relpath = row["relpath"]
    return MemberFacts(
        id=m.id, tier=tier, path=str(Path(row["root"]) / relpath),
        folder=str(Path(relpath).parent) if "/" in relpath else ".", width=m.meta.width, height=m.meta.height,
        file_size=row["size"] if row["size"] is not None else m.meta.file_size, format=m.meta.format,
        captured=row["captured"], camera=row["camera"], icc=bool(row["icc"]), modified=_iso(row["mtime_ns"] / 1e9),
        action=action[0], why=action[1], similarity=similarity, match=match)
