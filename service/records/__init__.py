"""The records DB: the system of record (SQLAlchemy Core on SQLite or PostgreSQL).

Redis only carries work; everything a user can read back lives here. Modules: ``tables`` (schema),
``engine`` (connecting, SQLite pragmas), ``schema`` (upgrading through ``migrations``, the revision
check at start), ``keys``, ``datasets``, ``submissions``, ``audit``.
"""
