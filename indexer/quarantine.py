"""Acting on duplicate groups: move every non-keeper copy into a quarantine folder, reversibly.

`plan_quarantine` is pure (it reads the catalog, the current generation and file
stats, and changes nothing): per group, the keeper chosen by the keeper rules,
the files that would move and where to, the files kept and why, the files left
alone because they changed. `apply_quarantine` carries a plan out under the
store's lock, one verified move at a time (`moves.move_verified`), journalled in a
manifest (`manifest.py`) and marked in the catalog; it first settles any run in
the same folder that was killed, and continues that run's manifest.

Only copies of the keeper in the tiers same-bytes, same-pixels and
near-duplicate are ever moved; groups of the "similar" tier never are.
Each source gets its own sub-folder of the quarantine folder
(``source-<id>-<name>/``) under which a file keeps its path relative to the
source, so two sources with the same relative path cannot collide. nearsight
never deletes an image: a source file is unlinked only once a verified copy of
its bytes is in place in the quarantine folder.
"""

from __future__ import annotations

import logging
import os
import re
import time
from dataclasses import dataclass, field
from pathlib import Path

from . import manifest
from .errors import NearsightError, UsageError
from .fsutil import fsync_dir, hash_file
from .generations import require_current
from .groups import TIERS, Group, ImageMeta
from .keepers import KeeperRules
from .moves import HashMismatch, holds, is_regular, move_verified, partial_path
from .store import Store

log = logging.getLogger(__name__)

ACTION_TIERS = ("same-bytes", "same-pixels", "near-duplicate")  # strongest first; never "similar"
_RANK = {tier: rank for rank, tier in enumerate(TIERS)}
# Tests only: "intent:N" or "moved:N" makes an applying run sleep after writing the Nth file's
# intent (before its move) or after its move (before its record), so a test can kill it there.
TEST_PAUSE_ENV = "NEARSIGHT_TEST_QUARANTINE_PAUSE"


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
    tier: str           # how it relates to the group's keeper

    def to_dict(self, to: Path | None) -> dict:
        out = {"id": self.file_id, "path": self.path, "dest_relative": self.dest_rel, "size": self.size,
               "content_hash": self.content_hash, "tier": self.tier}
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
    moves: list[Move] = field(default_factory=list)
    kept: list[dict] = field(default_factory=list)      # other members that stay, with the reason
    skipped: list[dict] = field(default_factory=list)   # members left alone because they changed

    def to_dict(self, to: Path | None) -> dict:
        return {"gid": self.gid, "tier": self.tier, "keeper": {"id": self.keeper, "path": self.keeper_path},
                "moves": [m.to_dict(to) for m in self.moves], "kept": self.kept, "skipped": self.skipped,
                "bytes_freed": sum(m.size for m in self.moves)}


@dataclass
class Plan:
    generation: str
    threshold: float | None      # None: the generation's own groups
    tier: str                    # the weakest tier acted on
    rules: KeeperRules
    to: Path | None
    groups: list[GroupPlan]
    similar_groups: int          # groups of the "similar" tier, never acted on

    @property
    def moves(self) -> list[Move]:
        return [m for g in self.groups for m in g.moves]

    @property
    def bytes_freed(self) -> int:
        return sum(m.size for m in self.moves)

    def options(self) -> dict:
        return {"generation": self.generation, "threshold": self.threshold, "tier": self.tier,
                "rules": self.rules.to_dict()}

    def to_dict(self) -> dict:
        return {**self.options(), "to": None if self.to is None else str(self.to),
                "groups": [g.to_dict(self.to) for g in self.groups],
                "summary": {"groups": sum(bool(g.moves) for g in self.groups), "files": len(self.moves),
                            "bytes_freed": self.bytes_freed, "kept": sum(len(g.kept) for g in self.groups),
                            "skipped": sum(len(g.skipped) for g in self.groups),
                            "similar_groups_ignored": self.similar_groups}}


def _load_groups(store: Store, gen, threshold: float | None, precision: float | None) -> tuple[list[Group], float | None]:
    """The generation's groups, or groups regrouped at a threshold (given, or read off the calibration)."""
    if threshold is not None and precision is not None:
        raise UsageError("give a threshold or a precision, not both")
    if precision is not None:
        threshold = gen.threshold("near", precision)
    if threshold is None:
        return [Group.from_dict(g) for g in gen.load_groups()["groups"]], None
    if not 0.0 < threshold <= 1.0:
        raise UsageError(f"a duplicate threshold is a cosine similarity in (0, 1], not {threshold}")
    if threshold < float(gen.meta["thresholds"]["near"]):
        log.warning("threshold %.3f is below the generation's duplicate threshold %.3f: check the plan before --apply",
                    threshold, gen.meta["thresholds"]["near"])
    from .build import compute_groups, load_vectors

    ids, xb = load_vectors(store, gen.meta["model"])
    if len(ids) == 0:
        return [], threshold
    xb = gen.load_whitening().apply(xb)
    return compute_groups(store, gen.load_index(), ids, xb, t_near=threshold, t_similar=threshold), threshold


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
                     format=m.format, mtime=row["mtime_ns"] / 1e9, pixel_hash=row["pixel_hash"]), None


def _relation(meta: ImageMeta, keeper: ImageMeta, group_tier: str) -> str:
    """How a member relates to the keeper: every member of a same-pixels group is the same picture."""
    if meta.content_hash == keeper.content_hash:
        return "same-bytes"
    if group_tier in ("same-bytes", "same-pixels") or (meta.pixel_hash and meta.pixel_hash == keeper.pixel_hash):
        return "same-pixels"
    return "near-duplicate"


def _plan_group(group: Group, rows: dict, rules: KeeperRules, tier: str) -> GroupPlan | None:
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
    keeper = rules.choose(present)
    kmeta = present[keeper]
    plan = GroupPlan(group.gid, group.tier, keeper, kmeta.path, kmeta.content_hash, skipped=skipped)
    for ident, meta in present.items():
        if ident == keeper:
            continue
        relation = _relation(meta, kmeta, group.tier)
        if rules.always_kept(meta.path):
            plan.kept.append({"id": ident, "path": meta.path, "reason": "always kept (keep_paths)"})
        elif _RANK[relation] > _RANK[tier]:
            plan.kept.append({"id": ident, "path": meta.path, "reason": f"{relation}, weaker than --tier {tier}"})
        else:
            row = rows[ident]
            dest = f"{source_folder(row['source_id'], row['root'])}/{row['relpath']}"
            plan.moves.append(Move(ident, meta.path, dest, meta.file_size, meta.content_hash, relation))
    return plan


def plan_quarantine(store: Store, *, tier: str | None = None, threshold: float | None = None,
                    precision: float | None = None, rules: KeeperRules | None = None,
                    to: str | os.PathLike | None = None) -> Plan:
    """What a quarantine would do, changing nothing on disk (regrouping at a threshold may cache
    pixel hashes in the catalog). `tier` is the weakest tier acted on (default near-duplicate)."""
    tier = tier or "near-duplicate"
    if tier not in ACTION_TIERS:
        raise UsageError(f"tier must be one of {', '.join(ACTION_TIERS)}, not {tier!r}")
    rules = rules if rules is not None else KeeperRules.from_settings(store.settings)
    folder = check_quarantine_dir(store, to) if to is not None else None
    gen = require_current(store)
    groups, threshold = _load_groups(store, gen, threshold, precision)
    actionable = [g for g in groups if g.tier in ACTION_TIERS]
    rows = store.catalog.file_rows(m.id for g in actionable for m in g.members)
    planned = [p for g in actionable if (p := _plan_group(g, rows, rules, tier)) is not None]
    return Plan(gen.name, threshold, tier, rules, folder, planned, len(groups) - len(actionable))


# ---------------------------------------------------------------- applying

def _pause_hook():
    spec = os.environ.get(TEST_PAUSE_ENV, "")
    stage, _, count = spec.partition(":")

    def pause(at: str, n: int) -> None:
        if spec and at == stage and str(n) == count:
            log.warning("%s: pausing after the %s of file %d", TEST_PAUSE_ENV, at, n)
            time.sleep(3600)

    return pause


def settle(store: Store, journal: manifest.ManifestWriter) -> dict:
    """Finish the story of every file a killed run left half-told, then make the catalog agree.

    A move whose verified copy is in place is completed (recorded, and the source's
    second name unlinked if it is still there); a move that had not happened is
    abandoned (the file stays where it is; a new plan may move it again)."""
    records = manifest.read(journal.path)
    counts = {"completed": 0, "abandoned": 0, "unaccounted": 0}
    for entry in manifest.entries(records).values():
        if entry.outcome is not None:
            continue
        src, dest, digest = Path(entry.intent["from"]), Path(entry.intent["to"]), entry.intent["hash"]
        moved = holds(dest, digest)
        if moved and holds(src, digest):
            os.unlink(src)  # a second name of (or a verified copy of) what is now at `dest`
            fsync_dir(src.parent)
            journal.write("moved", seq=entry.seq, method="completed")
            counts["completed"] += 1
        elif moved:  # the source's name is gone (or now holds another file, which stays)
            journal.write("moved", seq=entry.seq, method="found-moved")
            counts["completed"] += 1
        elif os.path.lexists(src):
            partial_path(dest).unlink(missing_ok=True)  # our unfinished copy; the file is whole at `src`
            journal.write("abandoned", seq=entry.seq, reason="the run stopped before this move; the file stayed")
            counts["abandoned"] += 1
        else:
            log.error("file %s of %s is at neither %s nor %s with its bytes", entry.intent["file_id"],
                      journal.path, src, dest)
            journal.write("abandoned", seq=entry.seq, reason="found at neither path with its catalogued bytes")
            counts["unaccounted"] += 1
    _sync_catalog(store, manifest.read(journal.path), journal.path)
    log.info("settled interrupted run %s: %s", journal.path, counts)
    return counts


def _sync_catalog(store: Store, records: list[dict], path: Path) -> None:
    moved = [e for e in manifest.entries(records).values()
             if e.outcome and e.outcome["record"] == "moved" and not any(r["record"] == "restored" for r in e.records)]
    rows = store.catalog.file_rows(e.intent["file_id"] for e in moved)
    for e in moved:
        row = rows.get(e.intent["file_id"])
        if row and row["state"] != "quarantined" and not os.path.lexists(e.intent["from"]) \
                and os.path.lexists(e.intent["to"]):
            store.catalog.mark_quarantined(e.intent["file_id"], e.intent["to"], str(path))


def _precheck(move: Move, dest: Path) -> str | None:
    """Why a planned file must be left alone (checked before its intent is written), or None."""
    src = Path(move.path)
    if not is_regular(src):
        return "missing or not a regular file"
    if hash_file(src) != move.content_hash:
        return "its bytes changed since it was catalogued"
    if os.path.lexists(dest):
        return f"{dest} already exists"
    return None


def _move_one(store: Store, move: Move, dest: Path, group: GroupPlan, journal, seq: int, pause) -> str | None:
    """Journal, move and mark one checked file; the reason it was abandoned, or None once moved."""
    src = Path(move.path)
    journal.write("intent", seq=seq, file_id=move.file_id, to=str(dest), size=move.size, group=group.gid,
                  keeper=group.keeper, keeper_path=group.keeper_path, tier=move.tier, hash=move.content_hash,
                  **{"from": move.path})
    pause("intent", seq)
    try:
        method = move_verified(src, dest, move.content_hash)
    except (HashMismatch, FileExistsError) as exc:
        journal.write("abandoned", seq=seq, reason=str(exc))
        return str(exc)
    except OSError as exc:
        journal.write("failed", seq=seq, error=f"{exc.strerror or exc}")
        raise NearsightError(
            f"cannot move {src} to {dest}: {exc.strerror or exc}. Nothing was lost: the file is still at {src}. "
            f"Moves done so far are in {journal.path}; fix the cause and run the same command again to continue, "
            f"or `nearsight restore {journal.path} --apply` to undo them") from None
    pause("moved", seq)
    journal.write("moved", seq=seq, method=method)
    store.catalog.mark_quarantined(move.file_id, str(dest), str(journal.path))
    return None


def _carry_out(store: Store, plan: Plan, journal, seq: int) -> tuple[list[dict], list[dict]]:
    """Move each planned file after the last `seq` of the journal; (moved, left alone) as dicts."""
    pause = _pause_hook()
    moved, skipped = [], []
    for group in plan.groups:
        # A group's copies move only while a verified keeper stays behind.
        keeper_ok = not group.moves or holds(Path(group.keeper_path), group.keeper_hash)
        for move in group.moves:
            dest = plan.to / move.dest_rel
            reason = _precheck(move, dest) if keeper_ok else f"its keeper {group.keeper_path} is missing or changed"
            if reason is not None:
                journal.write("skipped", file_id=move.file_id, reason=reason, **{"from": move.path})
            else:
                seq += 1
                reason = _move_one(store, move, dest, group, journal, seq, pause)
            if reason is None:
                moved.append({"id": move.file_id, "path": move.path, "dest": str(dest), "size": move.size})
            else:
                skipped.append({"id": move.file_id, "path": move.path, "reason": reason})
    return moved, skipped


def _open_runs(store: Store, folder: Path) -> list[Path]:
    """Interrupted runs of this store in `folder` (another store's are left to that store)."""
    mine = []
    for path in manifest.find_open(folder):
        if manifest.read(path)[0].get("store") == str(store.root):
            mine.append(path)
        else:
            log.warning("%s is an interrupted run of another store; leaving it alone", path)
    return mine


def apply_quarantine(store: Store, to: str | os.PathLike, *, tier: str | None = None,
                     threshold: float | None = None, precision: float | None = None,
                     rules: KeeperRules | None = None) -> dict:
    """Settle interrupted runs in `to` and continue the latest one's manifest (else start one),
    plan, then move each planned file, verified and journalled, under the store's lock."""
    folder = check_quarantine_dir(store, to)
    with store.lock():
        folder.mkdir(parents=True, exist_ok=True)
        store.catalog.add_quarantine_dir(folder)
        open_runs = _open_runs(store, folder)
        settled = {}
        for path in open_runs:
            with manifest.ManifestWriter(path) as journal:
                settled[str(path)] = settle(store, journal)
                if path != open_runs[-1]:
                    journal.write("end", superseded_by=str(open_runs[-1]))
        plan = plan_quarantine(store, tier=tier, threshold=threshold, precision=precision, rules=rules, to=folder)
        path = open_runs[-1] if open_runs else manifest.new_path(folder)
        started = time.monotonic()
        with manifest.ManifestWriter(path) as journal:
            if open_runs:
                journal.write("resumed", options=plan.options())
                seq = max(manifest.entries(manifest.read(path)), default=0)
            else:
                journal.write("run", format=manifest.FORMAT, version=manifest.VERSION, store=str(store.root),
                              quarantine=str(folder), options=plan.options())
                seq = 0
            moved, skipped = _carry_out(store, plan, journal, seq)
            totals = {"moved": len(moved), "skipped": len(skipped), "bytes_moved": sum(m["size"] for m in moved)}
            journal.write("end", **totals)
    log.info("quarantine: moved %d file(s) (%d bytes), skipped %d, in %.1f s", totals["moved"],
             totals["bytes_moved"], totals["skipped"], time.monotonic() - started)
    return {"manifest": str(path), "to": str(folder), "settled": settled, **totals,
            "moved_files": moved, "skipped_files": skipped, "plan": plan.to_dict()}
