"""A replay's records, read, decoded and encoded a chunk ahead in a second process.

Stepping is one core's work (the engine steps one record at a time), and
reading the records from the database, decoding their JSON and encoding
them costs a good part as much again. The worker cannot overlap the two (it
learns records as they arrive), but a replay knows all its records up
front: a child process reads and encodes the next chunk while this one steps
the last, so on two cores a replay runs at about the engine's own rate.

The child encodes with the lineage's encoder (rebuilt from its state: a
lineage never changes its encoder) by the engine's own ``Encoder.encode``,
and sends each chunk as arrays through a pipe, which holds at most about a
chunk: the child waits while the pipe is full, so memory stays flat.
Starting the child (a Python process and its imports) takes a good part of
a second: the replay reads inline meanwhile and hands over when the child
says it is ready, and below ``PIPELINE_MIN_RECORDS`` does not start one.
"""

from __future__ import annotations

import multiprocessing
from collections.abc import Iterator, Mapping
from multiprocessing.connection import Connection
from typing import Any

import numpy as np
from numpy.typing import NDArray

PIPELINE_MIN_RECORDS = 20_000

# (seqs, is_train, X, Y) of one chunk of train records, encoded.
Encoded = tuple[NDArray[np.int64], NDArray[np.bool_], NDArray[np.float64], NDArray[Any]]


class Unencodable(Exception):
    """A record after ``after`` does not encode: the caller reads that chunk
    itself and steps it, which names the record as the worker would."""

    def __init__(self, after: int) -> None:
        super().__init__(f"a record after {after} does not encode")
        self.after = after


class ReadAhead:
    """The child process reading ahead. It starts at once and says when it
    is ready (starting a Python process with its imports takes a good part
    of a second); until then the caller reads inline, then hands over with
    :meth:`chunks` from where it got to."""

    def __init__(self, url: str, model_id: int, upto: int, chunk_records: int,
                 spec: Mapping[str, Any], encoder_arrays: Mapping[str, Any],
                 encoder_meta: Mapping[str, Any]) -> None:
        context = multiprocessing.get_context("spawn")  # no connection or thread inherited
        self._conn, child_end = context.Pipe(duplex=True)
        self._child = context.Process(
            target=_read, name="keelson-replay-reader", daemon=True,
            args=(child_end, url, model_id, upto, chunk_records, dict(spec),
                  dict(encoder_arrays), dict(encoder_meta)))
        self._child.start()
        child_end.close()  # the child's end: EOF here if it dies
        self._ready = False

    def ready(self) -> bool:
        """Whether the child is ready to read (never waits)."""
        if not self._ready and self._conn.poll(0):
            self._expect(self._conn_recv(), "ready")
            self._ready = True
        return self._ready

    def chunks(self, after: int) -> Iterator[Encoded]:
        """The train records after ``after`` (up to the end), encoded, a chunk
        at a time. Unencodable, or RuntimeError with the child's error."""
        if not self._ready:
            self._expect(self._conn_recv(), "ready")
            self._ready = True
        self._conn.send(("start", after))
        while True:
            message = self._conn_recv()
            if message[0] == "chunk":
                yield message[1:]
            elif message[0] == "end":
                return
            else:
                self._expect(message, "chunk")

    def close(self) -> None:
        self._conn.close()
        if self._child.is_alive():
            self._child.terminate()
        self._child.join()

    def _conn_recv(self) -> Any:
        try:
            return self._conn.recv()
        except EOFError:
            raise RuntimeError("the replay's reader process ended unexpectedly") from None

    @staticmethod
    def _expect(message: Any, kind: str) -> None:
        if message[0] == kind:
            return
        if message[0] == "unencodable":
            raise Unencodable(message[1])
        raise RuntimeError(f"the replay's reader process failed: {message[1]}")


def _read(conn: Connection, url: str, model_id: int, upto: int, chunk_records: int,
          spec: dict[str, Any], encoder_arrays: dict[str, Any],
          encoder_meta: dict[str, Any]) -> None:
    """The child: say "ready", wait for where to start, then read, decode and
    encode every chunk from there, send it, then "end"."""
    from engine import EngineError
    from engine.encoding import Encoder
    from service.store.database import make_engine, make_sessionmaker
    from service.store.record_log import decode_json, iter_chunks

    engine = make_engine(url, json_deserializer=decode_json)
    try:
        encoder = Encoder.from_state(spec, encoder_arrays, encoder_meta)
        sessions = make_sessionmaker(engine)
        conn.send(("ready",))
        after = int(conn.recv()[1])
        for chunk in iter_chunks(sessions, model_id, upto, chunk_records, split="train",
                                 after=after):
            try:
                X = encoder.encode(chunk.features)
                Y = encoder.encode_labels(chunk.labels)
            except EngineError:
                conn.send(("unencodable", after))
                return
            conn.send(("chunk", chunk.seqs, chunk.is_train, X, Y))
            after = int(chunk.seqs[-1])
        conn.send(("end",))
    except (BrokenPipeError, EOFError):  # the replay stopped listening: nothing to tell
        pass
    except Exception as exc:  # noqa: BLE001 - reported to the parent, which raises it
        conn.send(("error", f"{type(exc).__name__}: {exc}"))
    finally:
        conn.close()
        engine.dispose()
