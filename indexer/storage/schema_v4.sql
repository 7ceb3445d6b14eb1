-- nearsight catalog, schema version 4: files moved into a quarantine folder.
-- A quarantined file keeps its row, its id, its verdicts and its history. Its state
-- 'quarantined' takes it out of the index at the next publish, and a scan that does
-- not find it in its source folder leaves it quarantined (it is not 'removed').
-- `nearsight restore` sets the state back to 'ok' and clears these columns.

ALTER TABLE files ADD COLUMN quarantine_path TEXT;      -- where the file is now
ALTER TABLE files ADD COLUMN quarantine_manifest TEXT;  -- the manifest that recorded the move
ALTER TABLE files ADD COLUMN quarantined_at REAL;

-- Every folder files were ever quarantined into: scans never read images from them.
CREATE TABLE IF NOT EXISTS quarantine_dirs (
    path       TEXT PRIMARY KEY,    -- absolute, resolved folder path
    first_used REAL NOT NULL
);
