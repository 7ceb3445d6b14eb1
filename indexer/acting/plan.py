"""The quarantine plan: what `nearsight quarantine` would move, where to, and on what evidence.

`plan_quarantine` is pure (it reads the catalog, the current groups with a person's verdicts
applied, and file stats, and changes nothing): per group, the keeper chosen by the keeper
rules, the files that would move, where to and on what evidence, the files kept and why, the
near-duplicates left in place because geometric verification did not confirm them, and the
files left alone because they changed. `quarantine.apply_quarantine` carries a plan out.

A file moves only on evidence against the file it duplicates (indexer/acting/evidence.py): the same
bytes, the same pixels, a person's "same", or a near-duplicate match that geometric
verification confirms (unverified ones only with `include_unverified`). A file that is merely
similar never moves. Among the files of a group that stay, one of each set of identical files
stays and the others move as its copies, so an exact copy is never kept just because its
picture was not shown to match the keeper.

Each source gets its own sub-folder of the quarantine folder (``source-<id>-<name>/``) under
which a file keeps its path relative to the source, so two sources with the same relative path
cannot collide.
"""

from __future__ import annotations

import os
import re
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path

from ..building.verdict_groups import PairVerdicts, current_groups
from ..core.errors import UsageError
from ..matching.groups import TIERS, Group, ImageMeta
from ..storage.store import Store
from .evidence import near_duplicate_evidence, relation_to_keeper
from .keepers import KeeperRules
from .moves import is_regular
from .picks import picks_by_path

ACTION_TIERS = TIERS[:-1]  # strongest first; never "similar"
_RANK = {tier: rank for rank, tier in enumerate(TIERS)}


def source_folder(source_id: int, root: str) -> str:
    """The quarantine sub-folder of one source: its id keeps two sources named alike apart."""
    name = re.sub(r"[^A-Za-z0-9._-]+", "_", Path(root).name).strip("._")
    return f"source-{source_id}-{name}" if name else f"source-{source_id}"


def check_quarantine_dir(store: Store, to: str | os.PathLike) -> Path:
    """The resolved quarantine folder; refused inside (or around) a source, where a scan would read it."""
    folder = Path(to).expanduser().resolve()
    if folder.exists() and not folder.is_dir():
        raise UsageError(f"quarantine folder {to} exists and is not a folder")
    for source in store.catalog.sources():
        root = Path(source["root"])
        if folder == root or root in folder.parents:
            raise UsageError(f"quarantine folder {folder} is inside the source folder {root}, where the next scan "
                             "would read the moved files as new images: choose a folder outside every source")
        if folder in root.parents:
            raise UsageError(f"quarantine folder {folder} contains the source folder {root}: "
                             "choose a folder outside every source")
    return folder


# ---------------------------------------------------------------- planning

@dataclass(frozen=True)
class Move:
    file_id: int
    path: str           # where the file is now
    dest_rel: str       # where it goes, relative to the quarantine folder
    size: int
    content_hash: str
    tier: str           # how it relates to the file it duplicates
    evidence: str       # what allows it to move (evidence.EVIDENCE)
    copy_of: int        # the file it duplicates, which stays: the group's keeper, or a file kept for itself
    copy_of_path: str
    copy_of_hash: str   # a move happens only while that file holds these bytes

    def to_dict(self, to: Path | None) -> dict:
        out = {"id": self.file_id, "path": self.path, "dest_relative": self.dest_rel, "size": self.size,
               "content_hash": self.content_hash, "tier": self.tier, "evidence": self.evidence,
               "copy_of": {"id": self.copy_of, "path": self.copy_of_path}}
        if to is not None:
            out["dest"] = str(to / self.dest_rel)
        return out


@dataclass
class GroupPlan:
    gid: str
    tier: str
    keeper: int
    keeper_path: str
    keeper_hash: str
    keeper_reason: str = ""  # why this member is the keeper, in plain words (KeeperRules.reason)
    moves: list[Move] = field(default_factory=list)
    kept: list[dict] = field(default_factory=list)      # other members that stay, with the reason
    skipped: list[dict] = field(default_factory=list)   # members left alone because they changed
    unverified: list[dict] = field(default_factory=list)  # near-duplicates left: verification did not confirm them

    def to_dict(self, to: Path | None) -> dict:
        return {"gid": self.gid, "tier": self.tier,
                "keeper": {"id": self.keeper, "path": self.keeper_path, "reason": self.keeper_reason},
                "moves": [m.to_dict(to) for m in self.moves], "kept": self.kept, "skipped": self.skipped,
                "unverified": self.unverified, "bytes_freed": sum(m.size for m in self.moves)}


@dataclass
class Plan:
    generation: str
    threshold: float | None      # None: the generation's own groups
    tier: str                    # the weakest tier acted on
    rules: KeeperRules
    to: Path | None
    groups: list[GroupPlan]
    similar_groups: int          # groups of the "similar" tier with nothing to move
    include_unverified: bool = False

    @property
    def moves(self) -> list[Move]:
        return [m for g in self.groups for m in g.moves]

    @property
    def bytes_freed(self) -> int:
        return sum(m.size for m in self.moves)

    def options(self) -> dict:
        return {"generation": self.generation, "threshold": self.threshold, "tier": self.tier,
                "include_unverified": self.include_unverified, "rules": self.rules.to_dict()}

    def to_dict(self) -> dict:
        return {**self.options(), "to": None if self.to is None else str(self.to),
                "groups": [g.to_dict(self.to) for g in self.groups],
                "summary": {"groups": sum(bool(g.moves) for g in self.groups), "files": len(self.moves),
                            "bytes_freed": self.bytes_freed, "kept": sum(len(g.kept) for g in self.groups),
                            "skipped": sum(len(g.skipped) for g in self.groups),
                            "unverified": sum(len(g.unverified) for g in self.groups),
                            "evidence": dict(Counter(m.evidence for m in self.moves)),
                            "similar_groups_ignored": self.similar_groups}}


def _present(member, row: dict | None) -> tuple[ImageMeta | None, str | None]:
    """The member as it is now, or why it cannot be acted on (None, None: already quarantined)."""
    if row is None or row["state"] == "removed":
        return None, "no longer in its source folder (removed)"
    if row["state"] == "quarantined":
        return None, None
    if row["state"] != "ok" or row["hash"] != member.meta.content_hash:
        return None, "changed since the index was built (run `nearsight index` again)"
    path = str(Path(row["root"]) / row["relpath"])
    try:
        st = os.lstat(path)
    except OSError:
        return None, "missing from disk"
    if not is_regular(Path(path)):
        return None, "not a regular file"
    if (st.st_size, st.st_mtime_ns) != (row["size"], row["mtime_ns"]):
        return None, "changed on disk since the last scan"
    m = member.meta
    return ImageMeta(path=path, content_hash=row["hash"], width=m.width, height=m.height, file_size=row["size"],
                     format=m.format, mtime=row["mtime_ns"] / 1e9, pixel_hash=row["pixel_hash"],
                     # the origin as the catalog knows it now (read once more for stores older than it)
                     captured=row["captured"], camera=row["camera"], icc=bool(row["icc"])), None


@dataclass(frozen=True)
class _Asked:
    """What a plan was asked for, beside the groups."""

    rules: KeeperRules
    tier: str
    include_unverified: bool


def _plan_group(store: Store, group: Group, rows: dict, verdicts: PairVerdicts, asked: _Asked) -> GroupPlan | None:
    present: dict[int, ImageMeta] = {}
    skipped = []
    for member in group.members:
        meta, reason = _present(member, rows.get(member.id))
        if meta is not None:
            present[member.id] = meta
        elif reason is not None:
            skipped.append({"id": member.id, "path": member.meta.path, "reason": reason})
    if len(present) < 2:
        return None
    keeper = asked.rules.choose(present)
    why = asked.rules.reason(present[keeper], [m for i, m in present.items() if i != keeper])
    plan = GroupPlan(group.gid, group.tier, keeper, present[keeper].path, present[keeper].content_hash,
                     keeper_reason=why, skipped=skipped)
    staying: dict[int, tuple[str, str]] = {}  # id -> (the plan's list, reason)
    movable = []
    for ident, meta in present.items():
        if ident == keeper:
            continue
        relation = relation_to_keeper(group, ident, keeper, present, verdicts)
        if asked.rules.always_kept(meta.path):
            staying[ident] = ("kept", "always kept (keep_paths)")
        elif relation == "similar":
            staying[ident] = ("kept", "only similar to the keeper: never moved")
        elif _RANK[relation] > _RANK[asked.tier]:
            staying[ident] = ("kept", f"{relation}, weaker than --tier {asked.tier}")
        else:
            movable.append((ident, relation))
    near = [ident for ident, relation in movable if relation == "near-duplicate"]
    evidence, left = near_duplicate_evidence(store, keeper, near, include_unverified=asked.include_unverified)
    for ident, relation in movable:
        if ident in left:
            staying[ident] = ("unverified", left[ident])
        else:
            plan.moves.append(_move(ident, keeper, relation, evidence.get(ident, relation), present, rows))
    for ident, original, relation in _copies_among(staying, present, asked):
        plan.moves.append(_move(ident, original, relation, relation, present, rows))
        del staying[ident]
    for ident, (where, reason) in staying.items():
        getattr(plan, where).append({"id": ident, "path": present[ident].path, "reason": reason})
    return plan


def plan_group(store: Store, group: Group, verdicts: PairVerdicts, rules: KeeperRules, *,
               tier: str = "near-duplicate", include_unverified: bool = False) -> GroupPlan | None:
    """The plan of one group (as `plan_quarantine` plans each; `rules` as given, picks included);
    None when fewer than two of its files are present."""
    rows = store.catalog.file_rows(m.id for m in group.members)
    return _plan_group(store, group, rows, verdicts, _Asked(rules, tier, bool(include_unverified)))


def _move(ident: int, original: int, relation: str, evidence: str, present: dict[int, ImageMeta], rows: dict) -> Move:
    meta, row, kept = present[ident], rows[ident], present[original]
    dest = f"{source_folder(row['source_id'], row['root'])}/{row['relpath']}"
    return Move(ident, meta.path, dest, meta.file_size, meta.content_hash, relation, evidence, original, kept.path,
                kept.content_hash)


def _copies_among(staying: dict, present: dict[int, ImageMeta], asked: _Asked) -> list[tuple[int, int, str]]:
    """(copy, the file it is a copy of, relation) among the files that stay: of each set of identical
    files (same bytes, or same pixels) one stays, chosen by the keeper rules, and the others are its copies."""
    identical: dict[tuple[str, str], list[int]] = {}
    for ident in staying:
        meta = present[ident]
        identical.setdefault(("pixels", meta.pixel_hash) if meta.pixel_hash else ("bytes", meta.content_hash),
                             []).append(ident)
    out = []
    for ids in identical.values():
        if len(ids) < 2:
            continue
        original = asked.rules.choose({i: present[i] for i in ids})
        for ident in ids:
            same_bytes = present[ident].content_hash == present[original].content_hash
            relation = "same-bytes" if same_bytes else "same-pixels"
            if ident != original and not asked.rules.always_kept(present[ident].path) \
                    and _RANK[relation] <= _RANK[asked.tier]:
                out.append((ident, original, relation))
    return out


def plan_quarantine(store: Store, *, tier: str | None = None, threshold: float | None = None,
                    precision: float | None = None, rules: KeeperRules | None = None,
                    to: str | os.PathLike | None = None, include_unverified: bool = False) -> Plan:
    """What a quarantine would do, changing nothing on disk (regrouping at a threshold may cache
    pixel hashes in the catalog). `tier` is the weakest relation to the keeper acted on (default
    near-duplicate); near-duplicates move only when verified, unless `include_unverified`."""
    tier = tier or "near-duplicate"
    if tier not in ACTION_TIERS:
        raise UsageError(f"tier must be one of {', '.join(ACTION_TIERS)}, not {tier!r}")
    rules = rules if rules is not None else KeeperRules.from_settings(store.settings)
    rules = rules.with_picks(picks_by_path(store.catalog))  # a person's choice comes first, however rules were made
    folder = check_quarantine_dir(store, to) if to is not None else None
    now = current_groups(store, threshold=threshold, precision=precision)
    rows = store.catalog.file_rows(m.id for g in now.groups for m in g.members)
    asked = _Asked(rules, tier, bool(include_unverified))
    planned = [p for g in now.groups if (p := _plan_group(store, g, rows, now.verdicts, asked)) is not None
               and (g.tier != "similar" or p.moves)]
    similar = sum(g.tier == "similar" for g in now.groups) - sum(p.tier == "similar" for p in planned)
    return Plan(now.generation.name, now.threshold, tier, rules, folder, planned, similar, bool(include_unverified))


