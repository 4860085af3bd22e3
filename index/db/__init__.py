"""The database folder's own records: the SQLite catalog, manifest.json, the indexed roots, opening the folder."""
