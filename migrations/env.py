"""Alembic environment: online only; batch mode on SQLite (it cannot ALTER most things in place)."""

from alembic import context

from fusion.db import make_engine
from fusion.models import Base

config = context.config


def _run(connection) -> None:
    context.configure(connection=connection, target_metadata=Base.metadata,
                      render_as_batch=connection.dialect.name == "sqlite", compare_type=True)
    with context.begin_transaction():
        context.run_migrations()


connection = config.attributes.get("connection")
if connection is not None:  # fusion.db.upgrade passes its own connection
    _run(connection)
else:  # the plain `alembic` command, configured from [tool.alembic] in pyproject.toml
    url = config.get_main_option("sqlalchemy.url") or __import__("os").environ.get(
        "OCCFUSE_DATABASE_URL", "sqlite:///occfuse.db")
    engine = make_engine(url, foreign_keys=False)
    with engine.begin() as conn:
        _run(conn)
    engine.dispose()
