"""Alembic environment: migrations run on the connection hemostream hands over."""

from alembic import context

from hemostream.store.schema import Base


def run() -> None:
    connection = context.config.attributes.get("connection")
    if connection is None:           # pragma: no cover - hemostream always passes one
        raise RuntimeError("run migrations through `hemostream db upgrade --db URL`")
    context.configure(connection=connection, target_metadata=Base.metadata,
                      render_as_batch=connection.dialect.name == "sqlite")
    with context.begin_transaction():
        context.run_migrations()


if hasattr(context, "config"):       # not when merely imported (e.g. a doctest collector)
    run()
