-- nearsight catalog, schema version 3: a person's verdicts on pairs of images.
-- Keyed by content (the pair's two content ids, smaller first), so a verdict stays
-- attached to the images when files are renamed or moved. Every verdict is kept;
-- the latest one for a pair is the one that counts.

CREATE TABLE IF NOT EXISTS verdicts (
    id         INTEGER PRIMARY KEY,
    content_a  INTEGER NOT NULL REFERENCES contents(id),
    content_b  INTEGER NOT NULL REFERENCES contents(id),
    file_a     INTEGER REFERENCES files(id),   -- the files shown to the person, for display
    file_b     INTEGER REFERENCES files(id),
    verdict    TEXT NOT NULL CHECK (verdict IN ('same', 'different')),
    origin     TEXT NOT NULL,                  -- csv | review | api
    author     TEXT,
    note       TEXT,
    created_at REAL NOT NULL,
    CHECK (content_a < content_b)
);
CREATE INDEX IF NOT EXISTS verdicts_pair ON verdicts(content_a, content_b, id);
