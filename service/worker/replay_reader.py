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
chunk: the child waits while the pipe is full, so memory stays flat. Below
``PIPELINE_MIN_RECORDS`` the records are read inline: starting a process
costs about a second.
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


def encoded_chunks(url: str, model_id: int, after: int, upto: int, chunk_records: int,
                   spec: Mapping[str, Any], encoder_arrays: Mapping[str, Any],
                   encoder_meta: Mapping[str, Any]) -> Iterator[Encoded]:
    """The train records in (after, upto], encoded, a chunk at a time, read
    by a child process. Unencodable, or RuntimeError with the child's error."""
    context = multiprocessing.get_context("spawn")  # no connection or thread inherited
    receive, send = context.Pipe(duplex=False)
    child = context.Process(
        target=_read, name="keelson-replay-reader", daemon=True,
        args=(send, url, model_id, after, upto, chunk_records, dict(spec),
              dict(encoder_arrays), dict(encoder_meta)))
    child.start()
    send.close()  # the child's end: EOF here if it dies
    try:
        while True:
            try:
                message = receive.recv()
            except EOFError:
                raise RuntimeError("the replay's reader process ended unexpectedly") from None
            kind = message[0]
            if kind == "chunk":
                yield message[1:]
            elif kind == "end":
                return
            elif kind == "unencodable":
                raise Unencodable(message[1])
            else:
                raise RuntimeError(f"the replay's reader process failed: {message[1]}")
    finally:
        receive.close()
        if child.is_alive():
            child.terminate()
        child.join()


def _read(out: Connection, url: str, model_id: int, after: int, upto: int,
          chunk_records: int, spec: dict[str, Any], encoder_arrays: dict[str, Any],
          encoder_meta: dict[str, Any]) -> None:
    """The child: read, decode and encode every chunk, send it, then "end"."""
    from engine import EngineError
    from engine.encoding import Encoder
    from service.store.database import make_engine, make_sessionmaker
    from service.store.record_log import decode_json, iter_chunks

    engine = make_engine(url, json_deserializer=decode_json)
    try:
        encoder = Encoder.from_state(spec, encoder_arrays, encoder_meta)
        for chunk in iter_chunks(make_sessionmaker(engine), model_id, upto, chunk_records,
                                 split="train", after=after):
            try:
                X = encoder.encode(chunk.features)
                Y = encoder.encode_labels(chunk.labels)
            except EngineError:
                out.send(("unencodable", after))
                return
            out.send(("chunk", chunk.seqs, chunk.is_train, X, Y))
            after = int(chunk.seqs[-1])
        out.send(("end",))
    except BrokenPipeError:  # the replay stopped listening: nothing to tell
        pass
    except Exception as exc:  # noqa: BLE001 - reported to the parent, which raises it
        out.send(("error", f"{type(exc).__name__}: {exc}"))
    finally:
        out.close()
        engine.dispose()
