"""Alembic migrations of hemostream's database schema (shipped inside the package).

Run them with ``hemostream db upgrade --db URL`` (see :mod:`hemostream.store.versions`).
A new database is created at the newest revision; a database of release 0.1.0 (no version
table, no ``config_snapshots``) is recognised as revision 0001.
"""
