"""Alembic migration environment of the store, shipped inside the package.

``versions/`` holds one revision per schema version; a revision's id is its version
number with four digits (``0001`` = version 1, the first layout; ``0002`` adds
``runs.run_uuid``). A revision's file carries its own frozen copy of whatever table
definitions it needs, never the live ones of :mod:`benchctl.store.schema`, so an old
migration means the same thing forever.

Adding version N: bump :data:`benchctl.store.schema.SCHEMA_VERSION`, change the tables
in ``schema.py``, and add ``versions/NNNN_<what>.py`` with ``revision = "NNNN"`` and
``down_revision`` the previous id. Its ``upgrade()`` must also set
``meta.schema_version`` to N. ``tests/test_store_migrations.py`` checks that the chain
of migrations and ``schema.create_schema`` give the same tables on every engine.

Run through :mod:`benchctl.store.migrate` (``benchctl db upgrade``), which hands
``env.py`` an open connection of the store's own engine, in a transaction.
"""
