-- nearsight catalog, schema version 2: embeddings per model, keyed by content,
-- so a renamed, moved or byte-identical file is never embedded again.

CREATE TABLE IF NOT EXISTS vectors (
    model      TEXT NOT NULL,             -- model version id
    content_id INTEGER NOT NULL REFERENCES contents(id),
    vector     BLOB NOT NULL,             -- float32, L2-normalised, little-endian
    PRIMARY KEY (model, content_id)
) WITHOUT ROWID;

-- Hash of the decoded full-size pixels, computed on demand for the same-pixels tier.
ALTER TABLE contents ADD COLUMN pixel_hash TEXT;
