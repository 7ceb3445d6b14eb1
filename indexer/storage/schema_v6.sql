-- nearsight catalog, schema version 6: the file a person chose to keep in its group (the review page's
-- "keep this one"). It is the first keeper rule (indexer/keepers.py): the latest pick among a group's
-- files wins, and removing a file's picks gives the choice back to the other rules.

CREATE TABLE keeper_picks (
    id INTEGER PRIMARY KEY,
    file_id INTEGER NOT NULL REFERENCES files(id),
    author TEXT,
    created_at REAL NOT NULL
);
CREATE INDEX keeper_picks_file ON keeper_picks(file_id);
