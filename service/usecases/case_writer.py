"""Group commit of new scored cases: one statement and one commit for every
keyed request of a process waiting at that moment.

A keyed prediction must not answer before its case is committed. Committed
one by one, each case cost a pool checkout with its ping and a transaction of
its own: on PostgreSQL two round trips and a commit per request, and with the
database on the same two cores the keyed GET ran at 0.38 of the unkeyed one.
Here the request threads of a process hand their cases to whichever of them
is writing (no thread of its own: the first thread to find nobody writing
writes, the cases that arrived meanwhile go with the next writer). The writer
inserts all waiting cases in one multi-row INSERT, committed by the statement
itself, and wakes each request with its own outcome: stored, or its key was
taken (then usecases.cases decides on the session path: a re-score or a
conflict). Each request still waits for the commit that holds its case, so a
2xx answer still means the case is durable.
"""

from __future__ import annotations

import json
import threading
import time
import weakref
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

from service.store.tables import ScoredCaseRow, utcnow

if TYPE_CHECKING:
    from sqlalchemy.orm import Session, sessionmaker

    from service.usecases.cases import ScoredCase

# A writer's connection idle longer than this goes back to the pool and a
# fresh one is checked out (with the engine's pre-ping): a restarted database
# is reconnected to, as on any other checkout. Busy, it is used as it is.
IDLE_RECHECK_SECONDS = 1.0
_COLUMNS = "(model_id, key, features, version_id, output, scored_at, rescored)"
_ROW = "({p}, {p}, {p}, (SELECT id FROM versions WHERE model_id = {p} AND number = {p}), " \
       "{p}, {p}, 0)"


@dataclass(slots=True)
class _Waiting:
    model_id: int
    version_number: int
    case: ScoredCase
    done: bool = False
    stored: bool = False
    error: BaseException | None = None
    params: tuple[Any, ...] = field(default=())


class CaseWriter:
    """The group commit of one database's new cases, in one process."""

    def __init__(self, sessions: sessionmaker[Session]) -> None:
        engine = sessions.kw["bind"]
        self._engine = engine
        self._marker = "?" if engine.dialect.name == "sqlite" else "%s"
        process = ScoredCaseRow.__table__.c.scored_at.type.dialect_impl(
            engine.dialect).bind_processor(engine.dialect)
        self._stamp: Any = process or (lambda moment: moment)
        self._turn = threading.Condition()
        self._waiting: list[_Waiting] = []
        self._writing = False
        self._connection: Any = None
        self._used = 0.0

    def insert_new(self, model_id: int, version_number: int, case: ScoredCase) -> bool:
        """Store ``case`` if its key is new to the model, committed before this
        returns; whether it was. Raises what the database raised."""
        mine = _Waiting(model_id, version_number, case, params=(
            model_id, case.key, json.dumps(case.features), model_id, version_number,
            json.dumps(case.output, allow_nan=False)))
        with self._turn:
            self._waiting.append(mine)
            while self._writing and not mine.done:
                self._turn.wait()
            if mine.done:
                return _outcome(mine)
            self._writing = True
            batch, self._waiting = self._waiting, []
        try:
            self._write(batch)
        except BaseException as error:  # every case of the batch fails with it
            for waiting in batch:
                waiting.error = error
        with self._turn:
            for waiting in batch:
                waiting.done = True
            self._writing = False
            self._turn.notify_all()
        return _outcome(mine)

    def _write(self, batch: list[_Waiting]) -> None:
        # One row per key: a key twice in the group goes in once, and the
        # later request finds it taken (a re-score or a conflict, decided
        # against the committed first one).
        first: dict[tuple[int, str], _Waiting] = {}
        for waiting in batch:
            first.setdefault((waiting.model_id, waiting.case.key), waiting)
        stamp = self._stamp(utcnow())
        rows = ", ".join([_ROW.format(p=self._marker)] * len(first))
        statement = (f"INSERT INTO scored_cases {_COLUMNS} VALUES {rows} ON CONFLICT "
                     "(model_id, key) DO NOTHING RETURNING model_id, key")
        params = [value for waiting in first.values() for value in (*waiting.params, stamp)]
        connection = self._checkout()
        try:
            cursor = connection.cursor()
            try:
                cursor.execute(statement, params)
                stored = {(row[0], row[1]) for row in cursor.fetchall()}
            finally:
                cursor.close()
        except BaseException:
            self._connection = None
            connection.invalidate()  # never reused in an unknown state
            raise
        self._used = time.monotonic()
        for key, waiting in first.items():
            waiting.stored = key in stored

    def _checkout(self) -> Any:
        """The writer's driver connection, in autocommit: each statement is
        its own committed transaction (SQLite connections run without
        implicit transactions, see service/store/database.py)."""
        if self._connection is not None and (
                time.monotonic() - self._used > IDLE_RECHECK_SECONDS):
            connection, self._connection = self._connection, None
            _give_back(connection)
        if self._connection is None:
            connection = self._engine.raw_connection()
            if self._engine.dialect.name == "postgresql":
                connection.driver_connection.autocommit = True
            self._connection = connection
        return self._connection


def _give_back(connection: Any) -> None:
    try:
        if getattr(connection.driver_connection, "autocommit", False) is True:
            connection.driver_connection.autocommit = False
    except Exception:  # a broken connection: never back to the pool in autocommit
        connection.invalidate()
    connection.close()


def _outcome(waiting: _Waiting) -> bool:
    if waiting.error is not None:
        raise waiting.error
    return waiting.stored


_writers: weakref.WeakKeyDictionary[Any, CaseWriter] = weakref.WeakKeyDictionary()
_writers_lock = threading.Lock()


def case_writer(sessions: sessionmaker[Session]) -> CaseWriter:
    """The process's writer for the database behind ``sessions``."""
    writer = _writers.get(sessions)
    if writer is None:
        with _writers_lock:
            writer = _writers.get(sessions)
            if writer is None:
                writer = _writers[sessions] = CaseWriter(sessions)
    return writer
