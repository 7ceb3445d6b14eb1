"""The SQLite catalog: every source folder, file and distinct content the store knows.

This module owns the connection, the schema and every SQL statement; no other
module writes SQL. Writes happen inside `transaction()` (BEGIN IMMEDIATE), so a
process killed mid-way leaves the last committed state, never a partial one.
"""

from __future__ import annotations

import json
import sqlite3
import time
from contextlib import contextmanager
from dataclasses import dataclass
from importlib import resources
from pathlib import Path
from typing import Iterable, Iterator

from ..core.errors import NotFoundError, StoreError, UsageError

SCHEMA_VERSION = 6

VERDICTS = ("same", "different")


def _run_sql_file(conn: sqlite3.Connection, name: str) -> None:
    """Run a bundled .sql file statement by statement, inside the caller's transaction
    (executescript would commit it first)."""
    script = resources.files(__package__).joinpath(name).read_text("utf-8")
    for statement in script.split(";"):
        if statement.strip() and sqlite3.complete_statement(statement + ";"):
            conn.execute(statement)


def _schema_v1(conn: sqlite3.Connection) -> None:
    _run_sql_file(conn, "schema.sql")


def _schema_v2(conn: sqlite3.Connection) -> None:
    _run_sql_file(conn, "schema_v2.sql")


def _schema_v3(conn: sqlite3.Connection) -> None:
    _run_sql_file(conn, "schema_v3.sql")


def _schema_v4(conn: sqlite3.Connection) -> None:
    _run_sql_file(conn, "schema_v4.sql")


def _schema_v5(conn: sqlite3.Connection) -> None:
    _run_sql_file(conn, "schema_v5.sql")


def _schema_v6(conn: sqlite3.Connection) -> None:
    _run_sql_file(conn, "schema_v6.sql")


# Ordered migrations: MIGRATIONS[n - 1] brings a catalog from version n - 1 to n.
MIGRATIONS = (_schema_v1, _schema_v2, _schema_v3, _schema_v4, _schema_v5, _schema_v6)
assert len(MIGRATIONS) == SCHEMA_VERSION  # a developer's invariant, not user input


@dataclass(frozen=True)
class FileRow:
    id: int
    source_id: int
    relpath: str
    size: int | None
    mtime_ns: int | None
    content_id: int | None
    state: str
    reason: str | None


@dataclass(frozen=True)
class ContentRow:
    id: int
    hash: str
    size: int
    state: str
    reason: str | None
    width: int | None
    height: int | None
    format: str | None
    thumb: bool


class Catalog:
    """One SQLite file; open it per thread or process (connections are not shared)."""

    def __init__(self, path: Path, *, create: bool = False):
        self.path = Path(path)
        if not create and not self.path.exists():
            raise StoreError(f"no catalog at {self.path}")
        try:
            self.conn = sqlite3.connect(self.path, timeout=30, isolation_level=None)
            self.conn.row_factory = sqlite3.Row
            self.conn.execute("PRAGMA journal_mode=WAL")
            # FULL under WAL: each commit fsyncs the write-ahead log before it returns, so what a command
            # reports done (a person's verdicts, a quarantine's marks, a scan) survives a power cut. NORMAL
            # would keep the file consistent but could lose the last commits; the index writes in batches
            # (one transaction per few hundred rows), so the extra fsyncs cost little (tests/test_durability.py
            # checks the order from a real strace).
            self.conn.execute("PRAGMA synchronous=FULL")
            self.conn.execute("PRAGMA foreign_keys=ON")
            self._migrate()
        except sqlite3.DatabaseError as exc:
            raise StoreError(f"cannot open catalog {self.path}: {exc}") from None

    def close(self) -> None:
        self.conn.close()

    def __enter__(self) -> "Catalog":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    # -- schema -----------------------------------------------------------
    def schema_version(self) -> int:
        return self.conn.execute("PRAGMA user_version").fetchone()[0]

    def _migrate(self) -> None:
        version = self.schema_version()
        if version > SCHEMA_VERSION:
            raise StoreError(
                f"catalog {self.path} has schema version {version}, newer than this "
                f"nearsight understands ({SCHEMA_VERSION}); upgrade nearsight"
            )
        for target in range(version + 1, SCHEMA_VERSION + 1):
            with self.transaction():
                if self.schema_version() >= target:  # another process (serve, a nightly run) got there first
                    continue
                MIGRATIONS[target - 1](self.conn)
                self.conn.execute(f"PRAGMA user_version={target}")
                self.conn.execute(
                    "INSERT OR REPLACE INTO meta(key, value) VALUES ('schema_version', ?)",
                    (str(target),),
                )

    @contextmanager
    def transaction(self) -> Iterator[sqlite3.Connection]:
        """BEGIN IMMEDIATE ... COMMIT, rolled back on any exception."""
        self.conn.execute("BEGIN IMMEDIATE")
        try:
            yield self.conn
        except BaseException:
            self.conn.execute("ROLLBACK")
            raise
        self.conn.execute("COMMIT")

    # -- sources ----------------------------------------------------------
    def add_source(self, root: Path) -> int:
        root_text = str(Path(root))
        row = self.conn.execute("SELECT id FROM sources WHERE root = ?", (root_text,)).fetchone()
        if row:
            return row["id"]
        with self.transaction():
            cur = self.conn.execute(
                "INSERT INTO sources(root, added_at) VALUES (?, ?)", (root_text, time.time())
            )
        return cur.lastrowid

    def sources(self) -> list[dict]:
        rows = self.conn.execute("SELECT id, root, added_at, last_scan_at FROM sources ORDER BY id")
        return [dict(r) for r in rows]

    def mark_source_scanned(self, source_id: int, when: float) -> None:
        with self.transaction():
            self.conn.execute("UPDATE sources SET last_scan_at = ? WHERE id = ?", (when, source_id))

    # -- files and contents ---------------------------------------------------
    def files_of_source(self, source_id: int) -> dict[str, FileRow]:
        rows = self.conn.execute(
            "SELECT id, source_id, relpath, size, mtime_ns, content_id, state, reason "
            "FROM files WHERE source_id = ?",
            (source_id,),
        )
        return {r["relpath"]: FileRow(**dict(r)) for r in rows}

    def content_by_hash(self, digest: str) -> ContentRow | None:
        row = self.conn.execute(
            "SELECT id, hash, size, state, reason, width, height, format, thumb "
            "FROM contents WHERE hash = ?",
            (digest,),
        ).fetchone()
        return ContentRow(**{**dict(row), "thumb": bool(row["thumb"])}) if row else None

    def present_files_with_hash(self, digest: str) -> list[dict]:
        """Id and path of every present readable file whose bytes have this content hash, by id."""
        rows = self.conn.execute(
            "SELECT f.id, s.root, f.relpath FROM contents c JOIN files f ON f.content_id = c.id AND f.state = 'ok' "
            "JOIN sources s ON s.id = f.source_id WHERE c.hash = ? ORDER BY f.id",
            (digest,),
        )
        return [{"id": r["id"], "path": str(Path(r["root"]) / r["relpath"])} for r in rows]

    def add_content(self, conn: sqlite3.Connection, digest: str, size: int, decoded: dict, now: float) -> int:
        """Insert a content row inside the caller's transaction; return its id."""
        cur = conn.execute(
            "INSERT INTO contents(hash, size, state, reason, format, mode, width, height, frames, thumb, first_seen, "
            "captured, camera, icc, origin_read) "
            "VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?) "
            "ON CONFLICT(hash) DO UPDATE SET hash = excluded.hash RETURNING id",
            (
                digest,
                size,
                decoded["state"],
                decoded.get("reason"),
                decoded.get("format"),
                decoded.get("mode"),
                decoded.get("width"),
                decoded.get("height"),
                decoded.get("frames"),
                int(bool(decoded.get("thumb"))),
                now,
                decoded.get("captured"),
                decoded.get("camera"),
                int(bool(decoded.get("icc"))),
                int(decoded["state"] == "ok"),
            ),
        )
        return cur.fetchone()[0]

    def contents_without_origin(self) -> list[dict]:
        """Readable contents whose EXIF and ICC facts were never read (catalogued before schema 5), each with
        one present file holding it: content id and path."""
        rows = self.conn.execute(
            "SELECT c.id, MIN(s.root || '/' || f.relpath) AS path FROM contents c "
            "JOIN files f ON f.content_id = c.id AND f.state = 'ok' JOIN sources s ON s.id = f.source_id "
            "WHERE c.state = 'ok' AND c.origin_read = 0 GROUP BY c.id"
        ).fetchall()
        return [{"id": r["id"], "path": r["path"]} for r in rows]

    def set_origins(self, origins: dict[int, tuple[str | None, str | None, bool]]) -> None:
        """Record (captured, camera, icc) per content id; read means read, whatever was found."""
        with self.transaction() as conn:
            conn.executemany("UPDATE contents SET captured = ?, camera = ?, icc = ?, origin_read = 1 WHERE id = ?",
                             [(cap, cam, int(bool(icc)), cid) for cid, (cap, cam, icc) in origins.items()])

    def upsert_file(
        self,
        conn: sqlite3.Connection,
        source_id: int,
        relpath: str,
        *,
        size: int | None,
        mtime_ns: int | None,
        content_id: int | None,
        state: str,
        reason: str | None,
        now: float,
    ) -> int:
        """Insert or update the row for one path inside the caller's transaction."""
        cur = conn.execute(
            "INSERT INTO files(source_id, relpath, size, mtime_ns, content_id, state, reason, first_seen, last_seen) "
            "VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?) "
            "ON CONFLICT(source_id, relpath) DO UPDATE SET size = excluded.size, "
            "mtime_ns = excluded.mtime_ns, content_id = excluded.content_id, state = excluded.state, "
            "reason = excluded.reason, last_seen = excluded.last_seen, quarantine_path = NULL, "
            "quarantine_manifest = NULL, quarantined_at = NULL RETURNING id",
            (source_id, relpath, size, mtime_ns, content_id, state, reason, now, now),
        )
        return cur.fetchone()[0]

    def vanished_with_content(self, content_id: int) -> list[dict]:
        """Present rows (ok or unreadable) holding `content_id`, with their source root and path:
        the rows a file with these bytes at a new path may have moved from (the scan checks the old
        path is gone). Removed and quarantined rows are never candidates."""
        rows = self.conn.execute(
            "SELECT f.id, f.source_id, s.root, f.relpath FROM files f JOIN sources s ON s.id = f.source_id "
            "WHERE f.content_id = ? AND f.state IN ('ok', 'unreadable') ORDER BY f.id",
            (content_id,),
        )
        return [dict(r) for r in rows]

    def move_file(self, conn: sqlite3.Connection, file_id: int, source_id: int, relpath: str, *,
                  size: int | None, mtime_ns: int | None, now: float) -> None:
        """A file found at a new path (same bytes, old path gone) keeps its row and id, inside the
        caller's transaction."""
        conn.execute(
            "UPDATE files SET source_id = ?, relpath = ?, size = ?, mtime_ns = ?, last_seen = ? WHERE id = ?",
            (source_id, relpath, size, mtime_ns, now, file_id),
        )

    def touch_files(self, conn: sqlite3.Connection, file_ids: Iterable[int], now: float) -> None:
        conn.executemany("UPDATE files SET last_seen = ? WHERE id = ?", [(now, i) for i in file_ids])

    def mark_missing_removed(self, source_id: int, seen_since: float) -> int:
        """Files of a source not seen by a scan that started at `seen_since` become removed."""
        with self.transaction():
            cur = self.conn.execute(
                "UPDATE files SET state = 'removed', reason = NULL "
                "WHERE source_id = ? AND last_seen < ? AND state NOT IN ('removed', 'quarantined')",
                (source_id, seen_since),
            )
        return cur.rowcount

    def file(self, file_id: int) -> dict | None:
        row = self.conn.execute(
            "SELECT f.id, s.root, f.relpath, f.size, f.mtime_ns, f.state, f.reason, f.first_seen, "
            "f.last_seen, c.hash, c.format, c.width, c.height "
            "FROM files f JOIN sources s ON s.id = f.source_id "
            "LEFT JOIN contents c ON c.id = f.content_id WHERE f.id = ?",
            (file_id,),
        ).fetchone()
        return dict(row) if row else None

    def image_meta(self, file_ids=None) -> dict[int, dict]:
        """What grouping needs per present readable file: path, hashes, size, format, mtime."""
        sql = (
            "SELECT f.id, s.root, f.relpath, f.size, f.mtime_ns, c.hash, c.pixel_hash, c.width, c.height, c.format, "
            "c.captured, c.camera, c.icc "
            "FROM files f JOIN sources s ON s.id = f.source_id JOIN contents c ON c.id = f.content_id "
            "WHERE f.state = 'ok'"
        )
        rows = []
        if file_ids is None:
            rows = self.conn.execute(sql).fetchall()
        else:
            ids = sorted(set(int(i) for i in file_ids))
            for start in range(0, len(ids), 500):
                chunk = ids[start : start + 500]
                rows += self.conn.execute(sql + f" AND f.id IN ({','.join('?' * len(chunk))})", chunk).fetchall()
        return {
            r["id"]: {
                "path": str(Path(r["root"]) / r["relpath"]), "content_hash": r["hash"], "pixel_hash": r["pixel_hash"],
                "width": r["width"] or 0, "height": r["height"] or 0, "file_size": r["size"] or 0,
                "format": r["format"] or "", "mtime": (r["mtime_ns"] or 0) / 1e9,
                "captured": r["captured"], "camera": r["camera"], "icc": bool(r["icc"]),
            }
            for r in rows
        }

    def set_pixel_hashes(self, by_content_hash: dict[str, str]) -> None:
        with self.transaction() as conn:
            conn.executemany("UPDATE contents SET pixel_hash = ? WHERE hash = ?",
                             [(p, c) for c, p in by_content_hash.items()])

    def _rows_by_file_id(self, select: str, file_ids) -> dict[int, sqlite3.Row]:
        """Rows of `select ... WHERE f.id IN (...)` keyed by f.id, asked 500 ids at a time."""
        ids = sorted(set(int(i) for i in file_ids))
        out: dict[int, sqlite3.Row] = {}
        for start in range(0, len(ids), 500):
            chunk = ids[start : start + 500]
            rows = self.conn.execute(f"{select} WHERE f.id IN ({','.join('?' * len(chunk))})", chunk)
            out.update({r["id"]: r for r in rows})
        return out

    def paths_for(self, file_ids) -> dict[int, str]:
        """Absolute paths of the given file ids (ids that do not exist are left out)."""
        rows = self._rows_by_file_id("SELECT f.id, s.root, f.relpath FROM files f JOIN sources s ON s.id = f.source_id",
                                     file_ids)
        return {i: str(Path(r["root"]) / r["relpath"]) for i, r in rows.items()}

    def pixel_sources(self, file_ids) -> dict[int, dict]:
        """Per file id: root, relpath, content hash and whether a small copy exists (`Store.pixels_path` reads it)."""
        rows = self._rows_by_file_id(
            "SELECT f.id, s.root, f.relpath, c.hash, c.thumb FROM files f JOIN sources s ON s.id = f.source_id "
            "JOIN contents c ON c.id = f.content_id", file_ids)
        return {i: dict(r) for i, r in rows.items()}

    def unreadable_files(self, limit: int | None = None) -> list[dict]:
        sql = (
            "SELECT f.id, s.root, f.relpath, f.reason FROM files f JOIN sources s ON s.id = f.source_id "
            "WHERE f.state = 'unreadable' ORDER BY s.root, f.relpath"
        )
        params: tuple = ()
        if limit is not None:
            sql += " LIMIT ?"
            params = (limit,)
        return [dict(r) for r in self.conn.execute(sql, params)]

    def files_with_hashes(self, source_id: int | None = None) -> list[dict]:
        """Every present file (not removed) with its state and content hash."""
        sql = (
            "SELECT f.id, f.source_id, f.relpath, f.state, f.reason, f.size, c.hash FROM files f "
            "LEFT JOIN contents c ON c.id = f.content_id WHERE f.state != 'removed'"
        )
        params: tuple = ()
        if source_id is not None:
            sql += " AND f.source_id = ?"
            params = (source_id,)
        return [dict(r) for r in self.conn.execute(sql + " ORDER BY f.id", params)]

    def readable_contents(self) -> list[dict]:
        """One row per distinct readable content with one of its present paths (lowest file id)."""
        rows = self.conn.execute(
            "SELECT c.id AS content_id, c.hash, c.width, c.height, c.thumb, c.first_seen, "
            "MIN(f.id) AS file_id, s.root, f.relpath "
            "FROM contents c JOIN files f ON f.content_id = c.id AND f.state = 'ok' "
            "JOIN sources s ON s.id = f.source_id "
            "WHERE c.state = 'ok' GROUP BY c.id ORDER BY c.id"
        )
        return [dict(r) for r in rows]

    # -- vectors ----------------------------------------------------------------------
    def contents_missing_vectors(self, model: str) -> list[dict]:
        """Readable contents of present files that have no vector under `model` yet."""
        rows = self.conn.execute(
            "SELECT c.id AS content_id, c.hash, c.thumb, MIN(f.id) AS file_id, s.root, f.relpath "
            "FROM contents c JOIN files f ON f.content_id = c.id AND f.state = 'ok' "
            "JOIN sources s ON s.id = f.source_id "
            "WHERE c.state = 'ok' AND NOT EXISTS "
            "(SELECT 1 FROM vectors v WHERE v.model = ? AND v.content_id = c.id) "
            "GROUP BY c.id ORDER BY c.id",
            (model,),
        )
        return [dict(r) for r in rows]

    def put_vectors(self, model: str, content_ids, vectors) -> None:
        """Store one block of vectors in one transaction (a killed run keeps whole blocks)."""
        with self.transaction() as conn:
            conn.executemany(
                "INSERT OR REPLACE INTO vectors(model, content_id, vector) VALUES (?, ?, ?)",
                [(model, int(c), v.astype("<f4").tobytes()) for c, v in zip(content_ids, vectors)],
            )

    def iter_file_vectors(self, model: str, block: int = 65_536):
        """Yield (file_ids, vectors) blocks for every present readable file with a vector."""
        import numpy as np

        cur = self.conn.execute(
            "SELECT f.id, v.vector FROM files f JOIN vectors v ON v.content_id = f.content_id AND v.model = ? "
            "WHERE f.state = 'ok' ORDER BY f.id",
            (model,),
        )
        while rows := cur.fetchmany(block):
            ids = np.fromiter((r[0] for r in rows), dtype=np.int64, count=len(rows))
            xb = np.frombuffer(b"".join(r[1] for r in rows), dtype="<f4").reshape(len(rows), -1)
            yield ids, np.ascontiguousarray(xb, dtype=np.float32)

    def indexable_items(self, model: str):
        """(file ids, content ids), sorted by file id, of every present readable file with a vector
        under `model`: what a generation of that model indexes."""
        import numpy as np

        rows = self.conn.execute(
            "SELECT f.id, f.content_id FROM files f JOIN vectors v ON v.content_id = f.content_id AND v.model = ? "
            "WHERE f.state = 'ok' ORDER BY f.id",
            (model,),
        ).fetchall()
        pairs = np.array([(r[0], r[1]) for r in rows], dtype=np.int64).reshape(-1, 2)
        return np.ascontiguousarray(pairs[:, 0]), np.ascontiguousarray(pairs[:, 1])

    def contents_with_vectors(self, model: str, content_ids) -> set[int]:
        """Those of `content_ids` that have a stored vector under `model`."""
        ids = sorted(set(int(i) for i in content_ids))
        out: set[int] = set()
        for start in range(0, len(ids), 500):
            chunk = ids[start : start + 500]
            out.update(r[0] for r in self.conn.execute(
                f"SELECT content_id FROM vectors WHERE model = ? AND content_id IN ({','.join('?' * len(chunk))})",
                (model, *chunk)))
        return out

    def contents_with_small_copies(self) -> list[str]:
        """The content hashes of readable contents the catalog records a small copy for."""
        return [r[0] for r in self.conn.execute("SELECT hash FROM contents WHERE state = 'ok' AND thumb = 1 ORDER BY id")]

    def quarantined_files(self) -> list[dict]:
        """Files in a quarantine folder: id, relpath, quarantine path and manifest, and their content's hash."""
        rows = self.conn.execute(
            "SELECT f.id, f.relpath, f.quarantine_path, f.quarantine_manifest, c.hash FROM files f "
            "LEFT JOIN contents c ON c.id = f.content_id WHERE f.state = 'quarantined' ORDER BY f.id")
        return [dict(r) for r in rows]

    def file_vectors(self, file_ids, model: str) -> dict:
        """file id -> its content's stored vector under `model` (float32), for present readable files."""
        import numpy as np

        ids = sorted(set(int(i) for i in file_ids))
        out: dict = {}
        for start in range(0, len(ids), 500):
            chunk = ids[start : start + 500]
            rows = self.conn.execute(
                "SELECT f.id, v.vector FROM files f JOIN vectors v ON v.content_id = f.content_id AND v.model = ? "
                f"WHERE f.state = 'ok' AND f.id IN ({','.join('?' * len(chunk))})",
                (model, *chunk),
            )
            out.update({r[0]: np.frombuffer(r[1], dtype="<f4").astype(np.float32) for r in rows})
        return out

    def count_vectors(self, model: str) -> int:
        return self.conn.execute("SELECT COUNT(*) FROM vectors WHERE model = ?", (model,)).fetchone()[0]

    # -- runs and status ------------------------------------------------------
    def start_run(self, kind: str) -> int:
        with self.transaction():
            cur = self.conn.execute(
                "INSERT INTO runs(kind, started_at, status) VALUES (?, ?, 'running')", (kind, time.time())
            )
        return cur.lastrowid

    def close_abandoned_runs(self, kind: str) -> int:
        """Runs of `kind` still 'running' belong to a process that died (the caller holds the lock):
        mark them 'interrupted'."""
        with self.transaction():
            cur = self.conn.execute(
                "UPDATE runs SET status = 'interrupted' WHERE kind = ? AND status = 'running'", (kind,)
            )
        return cur.rowcount

    def finish_run(self, run_id: int, status: str, summary: dict) -> None:
        with self.transaction():
            self.conn.execute(
                "UPDATE runs SET finished_at = ?, status = ?, summary = ? WHERE id = ?",
                (time.time(), status, json.dumps(summary, sort_keys=True), run_id),
            )

    def last_run(self, kind: str | None = None) -> dict | None:
        sql = "SELECT * FROM runs"
        params: tuple = ()
        if kind:
            sql += " WHERE kind = ?"
            params = (kind,)
        row = self.conn.execute(sql + " ORDER BY id DESC LIMIT 1", params).fetchone()
        if not row:
            return None
        out = dict(row)
        out["summary"] = json.loads(out["summary"]) if out["summary"] else None
        return out

    # -- a person's verdicts on pairs --------------------------------------
    def file_id_for_path(self, path: str | Path) -> int | None:
        """The present file at an absolute path (as catalogued), or None."""
        path = Path(path)
        for source in self.sources():
            root = Path(source["root"])
            try:
                rel = path.relative_to(root).as_posix()
            except ValueError:
                continue
            row = self.conn.execute(
                "SELECT id FROM files WHERE source_id = ? AND relpath = ? AND state != 'removed'",
                (source["id"], rel),
            ).fetchone()
            if row:
                return row["id"]
        return None

    def add_verdicts(self, pairs: Iterable[dict], *, origin: str, author: str | None = None) -> list[int]:
        """Store verdicts for pairs of file ids (``file_a``, ``file_b``, ``verdict``, optional
        ``note``), all or none. A pair must be two present files with different contents."""
        rows = []
        now = time.time()
        for pair in pairs:
            verdict = str(pair.get("verdict", "")).strip().lower()
            if verdict not in VERDICTS:
                raise UsageError(f"verdict must be one of {', '.join(VERDICTS)}, not {pair.get('verdict')!r}")
            try:
                a, b = int(pair["file_a"]), int(pair["file_b"])
            except (KeyError, TypeError, ValueError):
                raise UsageError("a verdict needs two image ids, file_a and file_b") from None
            contents = {}
            for file_id in (a, b):
                row = self.conn.execute(
                    "SELECT content_id FROM files WHERE id = ? AND state != 'removed'", (file_id,)
                ).fetchone()
                if row is None or row["content_id"] is None:
                    raise NotFoundError(f"no image with id {file_id}")
                contents[file_id] = row["content_id"]
            if contents[a] == contents[b]:
                raise UsageError(f"images {a} and {b} have the same bytes; a verdict is for two different files' contents")
            (ca, fa), (cb, fb) = sorted([(contents[a], a), (contents[b], b)])
            rows.append((ca, cb, fa, fb, verdict, origin, author, pair.get("note"), now))
        with self.transaction() as conn:
            ids = [
                conn.execute(
                    "INSERT INTO verdicts(content_a, content_b, file_a, file_b, verdict, origin, author, note, "
                    "created_at) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
                    row,
                ).lastrowid
                for row in rows
            ]
        return ids

    def latest_verdicts(self) -> list[dict]:
        """The latest verdict per content pair: content_a < content_b, file ids, verdict, origin, time."""
        rows = self.conn.execute(
            "SELECT v.* FROM verdicts v JOIN (SELECT MAX(id) AS id FROM verdicts "
            "GROUP BY content_a, content_b) last ON last.id = v.id ORDER BY v.id"
        )
        return [dict(r) for r in rows]

    def latest_verdict_files(self) -> list[dict]:
        """The latest verdict per content pair, once for every pair of files (not removed) holding
        those contents: verdict id, verdict, file_a, file_b; oldest verdict first."""
        rows = self.conn.execute(
            "SELECT v.id, v.verdict, fa.id AS file_a, fb.id AS file_b FROM verdicts v "
            "JOIN (SELECT MAX(id) AS id FROM verdicts GROUP BY content_a, content_b) last ON last.id = v.id "
            "JOIN files fa ON fa.content_id = v.content_a AND fa.state != 'removed' "
            "JOIN files fb ON fb.content_id = v.content_b AND fb.state != 'removed' "
            "ORDER BY v.id, fa.id, fb.id"
        )
        return [dict(r) for r in rows]

    def verdicts_version(self) -> int:
        """A number that changes with every verdict added or taken back: the newest verdict's id (0 without
        any) plus 2**40 for each taking back (`remove_verdicts`), so it never repeats although a removed
        newest id may be given again."""
        newest = self.conn.execute("SELECT COALESCE(MAX(id), 0) FROM verdicts").fetchone()[0]
        row = self.conn.execute("SELECT value FROM meta WHERE key = 'verdicts_removed'").fetchone()
        return newest + (int(row[0]) if row else 0) * 2**40

    def remove_verdicts(self, ids) -> int:
        """Take back verdicts by id (a person's undo, right after giving them); returns how many were there.
        The verdicts before them on the same pairs count again."""
        ids = sorted({int(i) for i in ids})
        if not ids:
            return 0
        with self.transaction() as conn:
            removed = conn.execute(f"DELETE FROM verdicts WHERE id IN ({','.join('?' * len(ids))})", ids).rowcount
            if removed:
                conn.execute("INSERT INTO meta(key, value) VALUES ('verdicts_removed', '1') ON CONFLICT(key) "
                             "DO UPDATE SET value = CAST(value AS INTEGER) + 1")
        return removed

    def latest_verdicts_among(self, file_ids) -> list[dict]:
        """The latest verdict per content pair whose two contents both belong to the given files
        (e.g. the members of one group), oldest first."""
        ids = sorted(set(int(i) for i in file_ids))
        if not ids:
            return []
        marks = ",".join("?" * len(ids))
        rows = self.conn.execute(
            f"WITH c AS (SELECT DISTINCT content_id FROM files WHERE id IN ({marks}) AND content_id IS NOT NULL) "
            "SELECT v.* FROM verdicts v JOIN (SELECT MAX(id) AS id FROM verdicts "
            "WHERE content_a IN (SELECT content_id FROM c) AND content_b IN (SELECT content_id FROM c) "
            "GROUP BY content_a, content_b) last ON last.id = v.id ORDER BY v.id",
            ids,
        )
        return [dict(r) for r in rows]

    def content_ids_of(self, file_ids) -> dict[int, int]:
        """file id -> content id for the given present files."""
        ids = sorted(set(int(i) for i in file_ids))
        out: dict[int, int] = {}
        for start in range(0, len(ids), 500):
            chunk = ids[start : start + 500]
            rows = self.conn.execute(
                f"SELECT id, content_id FROM files WHERE id IN ({','.join('?' * len(chunk))}) AND content_id IS NOT NULL",
                chunk,
            )
            out.update({r["id"]: r["content_id"] for r in rows})
        return out

    # -- quarantine ---------------------------------------------------------------
    def file_rows(self, file_ids) -> dict[int, dict]:
        """id -> source id and root, relpath, size, mtime_ns, state, content and pixel hash, the content's
        origin (captured, camera, icc), quarantine path, for the given files (any state; ids that do not exist
        are left out)."""
        ids = sorted(set(int(i) for i in file_ids))
        out: dict[int, dict] = {}
        for start in range(0, len(ids), 500):
            chunk = ids[start : start + 500]
            rows = self.conn.execute(
                "SELECT f.id, f.source_id, s.root, f.relpath, f.size, f.mtime_ns, f.state, f.quarantine_path, "
                "c.hash, c.pixel_hash, c.captured, c.camera, c.icc FROM files f JOIN sources s ON s.id = f.source_id "
                f"LEFT JOIN contents c ON c.id = f.content_id WHERE f.id IN ({','.join('?' * len(chunk))})",
                chunk,
            )
            out.update({r["id"]: dict(r) for r in rows})
        return out

    def mark_quarantined(self, file_id: int, path: str, manifest: str) -> None:
        """A file now lives at `path` in a quarantine folder; `manifest` recorded the move."""
        with self.transaction():
            self.conn.execute(
                "UPDATE files SET state = 'quarantined', reason = NULL, quarantine_path = ?, "
                "quarantine_manifest = ?, quarantined_at = ? WHERE id = ?",
                (path, manifest, time.time(), file_id),
            )

    def mark_restored(self, file_id: int) -> bool:
        """A quarantined file is back at its path: it is 'ok' again (True if the row changed)."""
        with self.transaction():
            cur = self.conn.execute(
                "UPDATE files SET state = 'ok', reason = NULL, quarantine_path = NULL, quarantine_manifest = NULL, "
                "quarantined_at = NULL WHERE id = ? AND state = 'quarantined'",
                (file_id,),
            )
        return cur.rowcount > 0

    def add_quarantine_dir(self, path: str | Path) -> None:
        with self.transaction():
            self.conn.execute("INSERT OR IGNORE INTO quarantine_dirs(path, first_used) VALUES (?, ?)",
                              (str(path), time.time()))

    def quarantine_dirs(self) -> list[str]:
        return [r["path"] for r in self.conn.execute("SELECT path FROM quarantine_dirs ORDER BY path")]

    def counts(self) -> dict:
        """Counts for `status`: files by state, unreadable reasons, distinct contents, bytes."""
        by_state = {
            r["state"]: r["n"]
            for r in self.conn.execute("SELECT state, COUNT(*) AS n FROM files GROUP BY state")
        }
        reasons = {
            r["code"]: r["n"]
            for r in self.conn.execute(
                "SELECT CASE WHEN instr(reason, ':') > 0 THEN substr(reason, 1, instr(reason, ':') - 1) "
                "ELSE reason END AS code, COUNT(*) AS n FROM files WHERE state = 'unreadable' "
                "GROUP BY code ORDER BY n DESC"
            )
        }
        row = self.conn.execute(
            "SELECT COUNT(DISTINCT content_id) AS contents, COALESCE(SUM(size), 0) AS bytes "
            "FROM files WHERE state = 'ok'"
        ).fetchone()
        dup = self.conn.execute(
            "SELECT COUNT(*) AS n FROM (SELECT content_id FROM files WHERE state = 'ok' "
            "GROUP BY content_id HAVING COUNT(*) > 1)"
        ).fetchone()
        return {
            "sources": self.conn.execute("SELECT COUNT(*) FROM sources").fetchone()[0],
            "files": sum(v for k, v in by_state.items() if k not in ("removed", "quarantined")),
            "ok": by_state.get("ok", 0),
            "unreadable": by_state.get("unreadable", 0),
            "removed": by_state.get("removed", 0),
            "quarantined": by_state.get("quarantined", 0),
            "unreadable_reasons": reasons,
            "distinct_contents": row["contents"],
            "bytes": row["bytes"],
            "same_bytes_groups": dup["n"],
        }
