"""Acting on duplicate groups: move the copies a plan lists into a quarantine folder, reversibly.

The plan (`plan.plan_quarantine`, re-exported here) says which files move and on what
evidence. `apply_quarantine` carries it out under the store's lock, one verified move at a
time (`moves.move_verified`), journalled in a manifest (`manifest.py`) and marked in the
catalog; it first settles any run in the same folder that was killed, and continues that
run's manifest. nearsight never deletes an image: a source file is unlinked only once a
verified copy of its bytes is in place in the quarantine folder, and only while the file it
duplicates is in place with its catalogued bytes.
"""

from __future__ import annotations

import logging
import os
import time
from pathlib import Path

from ..core.errors import NearsightError
from ..core.fsutil import fsync_dir, hash_file
from ..storage.store import Store
from . import manifest
from .keepers import KeeperRules
from .moves import HashMismatch, holds, is_regular, move_verified, partial_path
from .plan import GroupPlan, Move, Plan, check_quarantine_dir, plan_quarantine

log = logging.getLogger(__name__)
# Tests only: "intent:N" or "moved:N" makes an applying run sleep after writing the Nth file's
# intent (before its move) or after its move (before its record), so a test can kill it there.
TEST_PAUSE_ENV = "NEARSIGHT_TEST_QUARANTINE_PAUSE"


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
    sync_catalog(store, manifest.read(journal.path), journal.path)
    log.info("settled interrupted run %s: %s", journal.path, ", ".join(f"{k} {n}" for k, n in counts.items()))
    return counts


def sync_catalog(store: Store, records: list[dict], path: Path) -> None:
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
                  keeper=move.copy_of, keeper_path=move.copy_of_path, tier=move.tier, evidence=move.evidence,
                  hash=move.content_hash, **{"from": move.path})
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
    intact: dict[str, bool] = {}
    for group in plan.groups:
        for move in group.moves:
            # A copy moves only while the file it duplicates stays behind with its catalogued bytes.
            if move.copy_of_path not in intact:
                intact[move.copy_of_path] = holds(Path(move.copy_of_path), move.copy_of_hash)
            dest = plan.to / move.dest_rel
            reason = _precheck(move, dest) if intact[move.copy_of_path] else \
                f"the file it duplicates, {move.copy_of_path}, is missing or changed"
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
                     rules: KeeperRules | None = None, include_unverified: bool = False) -> dict:
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
        plan = plan_quarantine(store, tier=tier, threshold=threshold, precision=precision, rules=rules, to=folder,
                               include_unverified=include_unverified)
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
