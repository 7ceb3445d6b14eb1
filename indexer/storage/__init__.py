"""Storage: the store folder and its catalog.

A store is one folder: the SQLite catalog of sources, files, contents, vectors and verdicts (catalog,
with its schema_*.sql migrations), the small copies, the models and the published generations. `Store`
opens it, takes its lock and reads its settings (store). Every later stage reads and writes the
collection through these two modules.
"""
