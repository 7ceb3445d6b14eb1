-- nearsight catalog, schema version 1.
-- One row per registered source folder, per distinct content (bytes) and per
-- file path. A file's id is the image id used everywhere (CLI, HTTP, index).

CREATE TABLE IF NOT EXISTS meta (
    key   TEXT PRIMARY KEY,
    value TEXT NOT NULL
);

CREATE TABLE IF NOT EXISTS sources (
    id           INTEGER PRIMARY KEY,
    root         TEXT NOT NULL UNIQUE,   -- absolute, resolved folder path
    added_at     REAL NOT NULL,
    last_scan_at REAL
);

-- Byte-identical files share one content row: decoded, cached and embedded once.
CREATE TABLE IF NOT EXISTS contents (
    id         INTEGER PRIMARY KEY,
    hash       TEXT NOT NULL UNIQUE,     -- BLAKE2b-256 of the file's bytes, hex
    size       INTEGER NOT NULL,
    state      TEXT NOT NULL,            -- ok | unreadable
    reason     TEXT,                     -- "truncated: ..." when unreadable
    format     TEXT,
    mode       TEXT,
    width      INTEGER,                  -- after EXIF orientation
    height     INTEGER,
    frames     INTEGER,
    thumb      INTEGER NOT NULL DEFAULT 0, -- 1 when a small cached copy exists
    first_seen REAL NOT NULL
);

CREATE TABLE IF NOT EXISTS files (
    id         INTEGER PRIMARY KEY,      -- the image id, stable across runs
    source_id  INTEGER NOT NULL REFERENCES sources(id),
    relpath    TEXT NOT NULL,            -- path relative to the source root, '/' separated
    size       INTEGER,
    mtime_ns   INTEGER,
    content_id INTEGER REFERENCES contents(id),
    state      TEXT NOT NULL,            -- ok | unreadable | removed
    reason     TEXT,
    first_seen REAL NOT NULL,
    last_seen  REAL NOT NULL,
    UNIQUE (source_id, relpath)
);
CREATE INDEX IF NOT EXISTS files_content ON files(content_id);
CREATE INDEX IF NOT EXISTS files_state ON files(state);

-- One row per command run against the store (index, train, ...), with its summary.
CREATE TABLE IF NOT EXISTS runs (
    id          INTEGER PRIMARY KEY,
    kind        TEXT NOT NULL,
    started_at  REAL NOT NULL,
    finished_at REAL,
    status      TEXT NOT NULL,           -- running | ok | failed
    summary     TEXT                     -- JSON
);
