"""A test-only hold on a table's inserts, to put a process inside a write
transaction at a point the test chooses, and kill it there.

``install_hold(db, table, column)`` adds a trigger that stalls an INSERT into
``table`` whose ``column`` lies beyond the held value, while one is held
(``hold(db, beyond)``; ``release(db)`` ends it for the next inserts). A held
insert never commits: the process stays inside that transaction until it is
killed. Uses:

- a worker that must not finish the stream, however fast the engine gets:
  hold the versions beyond a cursor short of the last record, and whatever
  the worker does, its last committed version lies at or before it;
- a kill inside a version (or a batch) write, every time: hold everything,
  wait until ``inside_hold`` says the insert is stalled, kill.

PostgreSQL: ``pg_sleep`` in the trigger, seen in ``pg_stat_activity``; a
killed client's backend sleeps on with its row locks until ``end_orphans``
ends it, as the server would once it noticed. SQLite has no sleep: the
trigger counts a cross join of 320^4 rows, which takes minutes (320^3 took
under a second on an idle machine: too short), seen as the write lock held
without a break; a killed process's lock goes with it. Trigger bodies may
hold SELECT statements (SQLite docs, CREATE TRIGGER).
"""

from __future__ import annotations

import sqlite3
import time

from sqlalchemy import text

from service.store.database import Database

# Long enough never to end within a test: the stalled insert must not commit.
POSTGRES_SLEEP_SECONDS = 3600
# How long the SQLite write lock must stay taken, without a break, to count as
# the stalled insert: the worker's other write transactions (claims, lease
# renewals, version writes are all held) take milliseconds.
SQLITE_HELD_SECONDS = 1.0


def _postgres(db: Database) -> bool:
    return db.engine.dialect.name == "postgresql"


def install_hold(db: Database, table: str, column: str, on: str = "INSERT") -> None:
    """Create the hold table (empty: nothing held) and the stalling trigger;
    ``on="DELETE"`` stalls deletes of rows whose ``column`` lies beyond the
    held value instead."""
    assert on in ("INSERT", "DELETE")
    name = f"test_hold_{table}_{on.lower()}"
    row = "NEW" if on == "INSERT" else "OLD"
    if _postgres(db):
        statements = [
            "CREATE TABLE IF NOT EXISTS test_hold (beyond bigint NOT NULL)",
            f"""CREATE FUNCTION {name}() RETURNS trigger AS $$
                BEGIN
                  IF EXISTS (SELECT 1 FROM test_hold WHERE {row}.{column} > beyond) THEN
                    PERFORM pg_sleep({POSTGRES_SLEEP_SECONDS});
                  END IF;
                  RETURN {row};
                END $$ LANGUAGE plpgsql""",
            f"""CREATE TRIGGER {name} AFTER {on} ON {table}
                FOR EACH ROW EXECUTE FUNCTION {name}()""",
        ]
    else:
        statements = [
            "CREATE TABLE IF NOT EXISTS test_hold (beyond integer NOT NULL)",
            "CREATE TABLE IF NOT EXISTS test_hold_rows (n integer)",
            "DELETE FROM test_hold_rows",
            "WITH RECURSIVE c(n) AS (SELECT 1 UNION ALL SELECT n + 1 FROM c WHERE n < 320) "
            "INSERT INTO test_hold_rows SELECT n FROM c",
            f"""CREATE TRIGGER {name} AFTER {on} ON {table}
                WHEN EXISTS (SELECT 1 FROM test_hold WHERE {row}.{column} > beyond)
                BEGIN SELECT count(*) FROM test_hold_rows a, test_hold_rows b,
                                            test_hold_rows c, test_hold_rows d;
                END""",
        ]
    with db.engine.begin() as connection:
        for statement in statements:
            connection.execute(text(statement))


def hold(db: Database, beyond: int) -> None:
    """Stall every later insert whose held column exceeds ``beyond``."""
    with db.engine.begin() as connection:
        connection.execute(text("DELETE FROM test_hold"))
        connection.execute(text("INSERT INTO test_hold (beyond) VALUES (:b)"), {"b": beyond})


def release(db: Database) -> None:
    """Let later inserts through (a stalled one stays stalled until killed)."""
    with db.engine.begin() as connection:
        connection.execute(text("DELETE FROM test_hold"))


def inside_hold(db: Database) -> bool:
    """True while an insert is stalled inside the trigger."""
    if _postgres(db):
        with db.engine.connect() as connection:
            return bool(connection.execute(text(
                "SELECT count(*) FROM pg_stat_activity WHERE datname = current_database() "
                "AND wait_event = 'PgSleep'")).scalar())
    # SQLite: a writer holds the lock while BEGIN IMMEDIATE fails at once; only
    # the stalled insert holds it for long.
    path = db.engine.url.database
    held_until = time.monotonic() + SQLITE_HELD_SECONDS
    while True:
        probe = sqlite3.connect(str(path), timeout=0, isolation_level=None)
        try:
            probe.execute("BEGIN IMMEDIATE")
            probe.execute("ROLLBACK")
            return False
        except sqlite3.OperationalError:
            pass
        finally:
            probe.close()
        if time.monotonic() >= held_until:
            return True
        time.sleep(0.1)


def end_orphans(db: Database) -> None:
    """PostgreSQL: end every other session of this database (a killed
    client's backend, which would keep its locks while it sleeps)."""
    if _postgres(db):
        with db.engine.connect() as connection:
            connection.execute(text(
                "SELECT pg_terminate_backend(pid) FROM pg_stat_activity "
                "WHERE datname = current_database() AND pid <> pg_backend_pid()"))
