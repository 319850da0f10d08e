"""The shared fixtures give migrated, empty, separate databases."""

from sqlalchemy import inspect, select

from service.store.database import make_engine, make_sessionmaker
from service.store.schema import schema_is_current
from service.store.tables import ModelRow


def test_each_test_database_is_migrated_and_empty(database_url: str) -> None:
    engine = make_engine(database_url)
    try:
        assert schema_is_current(engine)
        tables = set(inspect(engine).get_table_names())
        assert {"models", "records", "versions", "jobs", "tokens", "trainers"} <= tables
        with make_sessionmaker(engine)() as session:
            assert session.scalars(select(ModelRow)).all() == []
    finally:
        engine.dispose()
