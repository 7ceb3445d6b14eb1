-- nearsight catalog, schema version 5: where each content came from, for the keeper rule.
-- Read from the file's EXIF and ICC profile by Pillow when it is decoded (indexer/images.py).
-- Contents catalogued before this version have `origin_read` 0 until `index` reads their headers once.

ALTER TABLE contents ADD COLUMN captured TEXT;                  -- EXIF capture time, ISO 8601, or NULL
ALTER TABLE contents ADD COLUMN camera TEXT;                    -- EXIF Make and Model, or NULL
ALTER TABLE contents ADD COLUMN icc INTEGER NOT NULL DEFAULT 0; -- 1 when the file embeds an ICC profile
ALTER TABLE contents ADD COLUMN origin_read INTEGER NOT NULL DEFAULT 0;
