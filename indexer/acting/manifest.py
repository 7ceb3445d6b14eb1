"""The quarantine manifest: a JSON Lines journal of every move, written as the moves happen.

One JSON object per line (https://jsonlines.org), each flushed and fsynced before
the next file is touched, so a run killed at any instant leaves a journal that
says what was about to happen and what did. Records (``"record"`` key):

- ``run``: the first line: format, version, store, quarantine folder, options.
- ``intent``: before a move: ``seq``, ``file_id``, ``from``, ``to``, ``hash``
  (BLAKE2b-256 of the bytes, as in the catalog), ``size``, ``group``, ``keeper`` and
  ``keeper_path`` (the file it duplicates, which stays), ``tier`` and ``evidence`` (why it moves).
- ``moved``: after the move was verified: ``seq``, ``method``.
- ``abandoned``: an intent that was not carried out (found so after a kill): ``seq``, ``reason``.
- ``failed``: the file system refused a move (full disk, read-only folder): ``seq``, ``error``.
- ``skipped``: a planned file left alone before any intent (its bytes changed, ...).
- ``resumed``: a later run took over an interrupted one; ``end``: the run finished, with counts.
- ``restore``, ``restored``, ``restore-skipped``, ``restore-failed``, ``restore-end``: `nearsight restore`.

A file's story is the records sharing its ``seq``; the last one tells where it is.
"""

from __future__ import annotations

import json
import logging
import os
import time
from dataclasses import dataclass, field
from pathlib import Path

from ..core.errors import UsageError
from ..core.fsutil import fsync_dir

log = logging.getLogger(__name__)

FORMAT = "nearsight-quarantine-manifest"
VERSION = 1
PREFIX = "manifest-"
SUFFIX = ".jsonl"
OUTCOMES = ("moved", "abandoned")  # final answers to an intent


class ManifestWriter:
    """Appends records; each is on disk (fsync) before `write` returns."""

    def __init__(self, path: Path):
        self.path = Path(path)
        self.path.parent.mkdir(parents=True, exist_ok=True)
        new = not self.path.exists()
        self._fh = open(self.path, "ab")
        if not new and self.path.stat().st_size:
            with open(self.path, "rb") as fh:
                fh.seek(-1, os.SEEK_END)
                if fh.read(1) != b"\n":  # a line torn by a kill: start ours on a fresh one
                    self._fh.write(b"\n")
        if new:
            fsync_dir(self.path.parent)

    def write(self, kind: str, **fields) -> dict:
        record = {"record": kind, **fields, "at": round(time.time(), 6)}
        self._fh.write(json.dumps(record, sort_keys=True).encode("utf-8") + b"\n")
        self._fh.flush()
        os.fsync(self._fh.fileno())
        return record

    def close(self) -> None:
        self._fh.close()

    def __enter__(self) -> "ManifestWriter":
        return self

    def __exit__(self, *exc) -> None:
        self.close()


def new_path(folder: Path) -> Path:
    """A fresh manifest name in `folder` that sorts by time (UTC)."""
    while True:
        now = time.time_ns()
        stamp = time.strftime("%Y%m%d-%H%M%S", time.gmtime(now // 1_000_000_000))
        path = Path(folder) / f"{PREFIX}{stamp}-{now // 1000 % 1_000_000:06d}{SUFFIX}"
        if not path.exists():
            return path


def read(path: Path) -> list[dict]:
    """Every record of a manifest; a last line torn by a kill is ignored."""
    path = Path(path)
    try:
        lines = path.read_bytes().split(b"\n")
    except FileNotFoundError:
        raise UsageError(f"manifest not found: {path}") from None
    except OSError as exc:
        raise UsageError(f"cannot read manifest {path}: {exc.strerror}") from None
    records = []
    for number, line in enumerate(lines, 1):
        if not line.strip():
            continue
        try:
            record = json.loads(line)
            if not isinstance(record, dict) or "record" not in record:
                raise ValueError("not a record")
        except ValueError:
            if all(not rest.strip() for rest in lines[number:]):
                log.warning("%s: ignoring a torn last line (a run was killed while writing it)", path)
                break
            raise UsageError(f"{path} line {number} is not a manifest record") from None
        records.append(record)
    if not records or records[0].get("record") != "run" or records[0].get("format") != FORMAT:
        raise UsageError(f"{path} is not a nearsight quarantine manifest")
    if records[0].get("version") != VERSION:
        raise UsageError(f"{path} is manifest version {records[0].get('version')}; this nearsight reads {VERSION}")
    return records


@dataclass
class Entry:
    """One file's story in a manifest."""

    intent: dict
    outcome: dict | None = None          # the last moved / abandoned record
    records: list[dict] = field(default_factory=list)

    @property
    def seq(self) -> int:
        return self.intent["seq"]


def entries(records: list[dict]) -> dict[int, Entry]:
    """seq -> Entry, in the order the intents were written."""
    out: dict[int, Entry] = {}
    for record in records:
        seq = record.get("seq")
        if record["record"] == "intent":
            out[seq] = Entry(record)
        elif seq in out:
            out[seq].records.append(record)
            if record["record"] in OUTCOMES:
                out[seq].outcome = record
    return out


def is_open(records: list[dict]) -> bool:
    """A quarantine run that never wrote its `end` record (killed, or stopped by an error)."""
    return not any(r["record"] == "end" for r in records)


def find_open(folder: Path) -> list[Path]:
    """Manifests in a quarantine folder whose run did not finish, oldest first."""
    found = []
    for path in sorted(Path(folder).glob(f"{PREFIX}*{SUFFIX}")):
        try:
            if is_open(read(path)):
                found.append(path)
        except UsageError as exc:
            log.warning("skipping %s: %s", path, exc.message)
    return found
