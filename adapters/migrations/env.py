"""Alembic environment of the results store.

`adapters.store.SqlStore` runs the migrations itself on open, handing over its open
connection in ``config.attributes["connection"]``; nothing here reads an ini file or
configures logging, so the daemon's logging setup stays as it is.
"""

from __future__ import annotations

from alembic import context

#: Our own version table, so a database shared with other Alembic users does not clash.
VERSION_TABLE = "branchwatch_schema_version"


def _run() -> None:
    connection = context.config.attributes.get("connection")
    if connection is None:
        raise RuntimeError(
            "the branchwatch migrations run through SqlStore, which passes its connection; "
            "open the store instead of calling alembic from the command line"
        )
    context.configure(
        connection=connection,
        target_metadata=None,
        version_table=VERSION_TABLE,
        # SQLite cannot ALTER most things in place; batch mode recreates the table.
        render_as_batch=connection.dialect.name == "sqlite",
    )
    with context.begin_transaction():
        context.run_migrations()


def _under_alembic() -> bool:
    try:
        context.is_offline_mode()
    except NameError:  # imported outside a migration run (e.g. by doctest collection)
        return False
    return True


if _under_alembic():
    if context.is_offline_mode():
        raise RuntimeError("offline (SQL script) mode is not supported by the branchwatch store")
    _run()
