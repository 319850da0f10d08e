"""`Learner`: one trained state (spec, encoder, network, optimizer, running metrics).

This is what a model version holds and what service/ calls: encode records,
learn from them online, predict, evaluate, retrain in batch, explain, and
round-trip through snapshot bytes.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Mapping, Sequence
from typing import Any

import numpy as np
from numpy.typing import NDArray

from engine import batch, snapshot
from engine.attribution import EXACT_FIELDS, Explanation, check_row, explain
from engine.encoding import Encoder
from engine.errors import InvalidInputError, NonFiniteError, SnapshotError
from engine.metrics import Prequential, batch_metrics
from engine.network import Network
from engine.online import OnlineTrainer, check_targets
from engine.optimizers import Optimizer, make_optimizer
from engine.rows import BLOCK_ROWS, ArrayRows, Rows
from engine.spec import apply_defaults, spec_hash, upgrade_legacy_spec

Array = NDArray[np.float64]
OUTPUT_OF_TASK = {"binary": "logistic", "multiclass": "softmax", "regression": "identity"}


class Learner:
    """A network with its encoder, optimizer state and prequential metrics."""

    def __init__(self, spec: Mapping[str, Any], encoder: Encoder, network: Network,
                 *, prequential: Prequential | None = None, records_seen: int = 0,
                 input_sum: Array | None = None, input_count: int = 0,
                 extra: Mapping[str, Any] | None = None) -> None:
        self.spec: dict[str, Any] = apply_defaults(spec)
        # The spec's hash, worked out at the first snapshot: a learner's spec is
        # fixed, and hashing it cost a quarter of each snapshot.
        self._spec_hash: str | None = None
        self.encoder = encoder
        self.loss: str = self.spec["loss"]
        self.prequential = prequential or Prequential(self.task, len(encoder.classes))
        self.records_seen = records_seen
        self.input_sum = np.zeros(encoder.n_inputs) if input_sum is None else input_sum
        self.input_count = input_count
        self._mean: Array | None = None  # input_mean, computed when first asked for
        # input_mean in raw units, for the explanations' default baseline: (the mean
        # array it was worked out from, the dict); stale once _mean is a new array.
        self._raw_mean: tuple[Array, dict[str, Any]] | None = None
        # Class label -> index for explain(output=label), by _exact_key-like
        # (type, value) keys; only labels that are classes get in, so it stays small.
        self._output_indices: dict[tuple[type, Any], int] = {}
        self.extra: dict[str, Any] = dict(extra or {})
        self._install(network, make_optimizer(network.params.size, self.spec["training"]))

    def _install(self, network: Network, optimizer: Optimizer) -> None:
        self.network = network
        self.optimizer = optimizer
        self._trainer = OnlineTrainer(network, optimizer, self.loss)

    def retune(self, training: Mapping[str, Any]) -> None:
        """Learn on with other training options (a settings change): the
        weights, the optimizer's state and step count stay; only the options
        (rate, schedule, momentum, clipping, ...) change. The same result as
        snapshotting, editing the spec's training and loading it back, so a
        replay can apply a change at the same record. Retuning to the options
        it has changes nothing. InvalidInputError for another optimizer kind
        (its state would not carry over)."""
        spec = apply_defaults({**self.spec, "training": {**self.spec["training"], **training}})
        optimizer = make_optimizer(self.network.params.size, spec["training"])
        if optimizer.kind != self.optimizer.kind:
            raise InvalidInputError("the optimizer cannot change during training",
                                    field="training.optimizer")
        state, steps = self.optimizer.state_arrays(), self.optimizer.step_count
        self.spec, self._spec_hash = spec, None
        self._install(self.network, optimizer)
        optimizer.load_state(state, steps)

    # ----------------------------------------------------------------- creation
    @classmethod
    def create(cls, spec: Mapping[str, Any], warmup: Iterable[Mapping[str, Any]] = (),
               warmup_labels: Iterable[Any] = ()) -> Learner:
        """New learner: encoder statistics from the warm-up rows (and labels, for a
        regression target), network initialised from spec['training']['seed']."""
        full = apply_defaults(spec)
        encoder = Encoder.from_spec(full, warmup=warmup, warmup_labels=warmup_labels)
        return cls(full, encoder, cls._new_network(full, encoder))

    @staticmethod
    def _new_network(spec: Mapping[str, Any], encoder: Encoder) -> Network:
        sizes = (encoder.n_inputs, *spec["hidden_layers"], encoder.n_outputs)
        rng = np.random.default_rng(int(spec["training"]["seed"]))
        return Network.create(sizes, spec["activation"], OUTPUT_OF_TASK[spec["task"]], rng)

    # -------------------------------------------------------------- properties
    @property
    def task(self) -> str:
        return str(self.spec["task"])

    @property
    def classes(self) -> list[Any]:
        """Class labels in index order ([] for regression)."""
        return list(self.encoder.classes)

    @property
    def fields(self) -> tuple[str, ...]:
        return self.encoder.fields

    @property
    def input_mean(self) -> Array:
        """Mean encoded input of every record learnt (the default attribution baseline);
        zeros, the centre of the standardisation, before any."""
        if self._mean is None:
            self._mean = (self.input_sum / self.input_count if self.input_count
                          else np.zeros(self.encoder.n_inputs))
            self._mean.flags.writeable = False  # shared between calls: read-only
        return self._mean

    # ----------------------------------------------------------------- encoding
    def encode(self, rows: Sequence[Mapping[str, Any]]) -> Array:
        """Raw feature rows -> X (n, n_inputs)."""
        return self.encoder.encode(rows)

    def encode_labels(self, labels: Sequence[Any]) -> NDArray[Any]:
        """Labels -> class indices (n,) int64 or standardised values (n,) float64."""
        return self.encoder.encode_labels(labels)

    def _targets(self, X: Array, Y: NDArray[Any]) -> tuple[Array, NDArray[Any]]:
        X = self.network.check_inputs(X)
        return X, check_targets(Y, X.shape[0], self.network.n_outputs, self.network.output)

    # --------------------------------------------------------------- learning
    def learn(self, X: Array, Y: NDArray[Any]) -> Array:
        """Online: score each row, then one optimizer step on it, in order.

        Returns the pre-step scores (n, n_outputs): p(class 1), class probabilities or
        raw values. On NonFiniteError (`.applied` rows were applied), the state is
        what it was after those rows.
        """
        X, y = self._targets(X, Y)
        scores = np.empty((X.shape[0], self.network.n_outputs))
        try:
            applied = self._trainer.learn(X, y, scores, self.prequential,
                                          self.encoder.target_center,
                                          self.encoder.target_scale)
        except NonFiniteError as exc:
            applied = exc.applied
            self._count(X[:applied])
            raise
        self._count(X)
        return scores

    def _count(self, X: Array) -> None:
        if X.shape[0] == 0:
            return
        # Rows are added one after another (a reduction down axis 0 is sequential), so
        # the sum does not depend on how the stream was cut into calls.
        stacked = np.concatenate([self.input_sum[None, :], X])
        self.input_sum = np.add.reduce(stacked, axis=0)
        self.input_count += X.shape[0]
        self._mean = None
        self.records_seen += X.shape[0]

    def fit(self, X: Array, Y: NDArray[Any], progress: batch.Progress | None = None,
            cancel: Callable[[], bool] | None = None,
            warm_start: bool = False) -> batch.FitReport:
        """Batch retrain on (X, Y) in memory: :meth:`fit_rows` of ``ArrayRows``."""
        X, y = self._targets(X, Y)
        return self.fit_rows(ArrayRows(X, y), progress=progress, cancel=cancel,
                             warm_start=warm_start)

    def fit_rows(self, rows: Rows, progress: batch.Progress | None = None,
                 cancel: Callable[[], bool] | None = None,
                 warm_start: bool = False) -> batch.FitReport:
        """Batch retrain on encoded rows (engine/rows.py: in memory, or a source
        that reads them a block at a time): mini-batch epochs with early stopping.

        From scratch the network is re-initialised from the seed (build the learner
        with `create(spec, warmup=training rows)` first to refresh the encoder);
        with warm_start it continues from the current weights. The learner changes
        only if the fit succeeds; the online optimizer state starts afresh after it.
        """
        n = len(rows)
        if n < 1:
            raise InvalidInputError("a fit needs at least one row", field="records")
        # One pass first: every row checked before any step, and the input sum
        # (a sequential sum, the same however the rows are cut) for the baseline.
        input_sum = self.input_sum.copy() if warm_start else np.zeros(self.encoder.n_inputs)
        for start in range(0, n, BLOCK_ROWS):
            X, Y = rows.take(np.arange(start, min(start + BLOCK_ROWS, n)))
            X, _ = self._targets(X, Y)
            input_sum = np.add.reduce(np.concatenate([input_sum[None, :], X]), axis=0)
        training = self.spec["training"]
        network = self.network.copy() if warm_start else \
            self._new_network(self.spec, self.encoder)
        optimizer = make_optimizer(network.params.size, training)
        network.bind_(optimizer.params)
        report = batch.fit(network, optimizer, self.loss, rows, training,
                           progress=progress, cancel=cancel)
        self._install(network, make_optimizer(network.params.size, training))
        if not warm_start:
            self.input_count = 0
        self.input_sum = input_sum
        self.input_count += n
        self._mean = None
        return report

    # -------------------------------------------------------------- inference
    def predict(self, X: Array) -> Array:
        """Class probabilities (n, n_classes), or values (n, 1) in raw target units."""
        out = self.network.forward(X)
        if self.task == "binary":
            both = np.empty((out.shape[0], 2))
            np.subtract(1.0, out[:, 0], out=both[:, 0])
            both[:, 1] = out[:, 0]
            return both
        if self.task == "regression":
            return self.encoder.decode_values(out)
        return out

    def evaluate(self, X: Array, Y: NDArray[Any]) -> dict[str, float]:
        """Batch metrics of the current network on (X, Y)."""
        X, y = self._targets(X, Y)
        scores = self.network.forward(X)
        if self.task == "regression":
            return batch_metrics(self.task, self.encoder.decode_values(y),
                                 self.encoder.decode_values(scores))
        return batch_metrics(self.task, y, scores)

    def prequential_metrics(self) -> dict[str, float]:
        """Test-then-train metrics of every record learnt online."""
        return self.prequential.result()

    def explain(self, x_row: Array | Mapping[str, Any],
                method: str = "integrated_gradients", output: Any = None, steps: int = 64,
                baseline: Array | Mapping[str, Any] | None = None,
                samples: int | None = None, noise: float = 0.15, seed: int = 0,
                exact_fields: int = EXACT_FIELDS) -> Explanation:
        """Attributions of one prediction per field (see engine.attribution).

        `x_row` and `baseline` are encoded rows (n_inputs,) or raw feature mappings;
        the baseline defaults to `input_mean`. `output` is a class label (default:
        the predicted class) or None for regression.
        """
        x = self._row(x_row, "x")
        raw_base: dict[str, Any] | None = None
        if baseline is None:
            base = self.input_mean
            if self._raw_mean is None or self._raw_mean[0] is not base:
                check_row("baseline", base, self.encoder.n_inputs)  # once per mean
                self._raw_mean = (base, self.encoder.raw_baseline(base))
            raw_base = self._raw_mean[1]
        else:
            base = self._row(baseline, "baseline")
        index: int | None
        if self.task == "regression":
            index = 0
        elif output is None:
            index = None  # explain() picks the predicted class from its own forward pass
        else:
            index = self._output_index(output)
        return explain(self.network, self.encoder, x, method=method, output_index=index,
                       baseline=base, steps=steps, samples=samples, noise=noise, seed=seed,
                       raw_baseline=raw_base, exact_fields=exact_fields)

    def _output_index(self, output: Any) -> int:
        """The class index of a class label; InvalidInputError (field output) if none."""
        key = (type(output), output)
        try:
            return self._output_indices[key]
        except (KeyError, TypeError):  # not seen yet, or unhashable (never a class)
            pass
        try:
            index = int(self.encoder.encode_labels([output])[0])
        except InvalidInputError as exc:
            raise InvalidInputError(str(exc), field="output") from None
        self._output_indices[key] = index
        return index

    def _row(self, row: Array | Mapping[str, Any], name: str) -> Array:
        """An encoded row; explain() itself checks its shape and finiteness."""
        if type(row) is not np.ndarray and isinstance(row, Mapping):  # (ABC check last)
            encoded: Array = self.encode([row])[0]
            return encoded
        return row

    # --------------------------------------------------------------- snapshot
    def to_bytes(self, extra: Mapping[str, Any] | None = None) -> bytes:
        """Snapshot bytes (npz of arrays + JSON metadata); `extra` must be JSON-able."""
        if extra is not None:
            self.extra = dict(extra)
        arrays: dict[str, NDArray[Any]] = {
            "params": self.network.params.copy(),
            "input_sum": self.input_sum.copy(),
        }
        arrays.update({f"optimizer.{k}": v for k, v in self.optimizer.state_arrays().items()})
        arrays.update({f"encoder.{k}": v for k, v in self.encoder.arrays().items()})
        arrays.update({f"prequential.{k}": v for k, v in self.prequential.arrays().items()})
        meta = {
            "spec": self.spec,
            "spec_hash": self._spec_hash or self._hash_spec(),
            "sizes": list(self.network.sizes),
            "records_seen": self.records_seen,
            "input_count": self.input_count,
            "optimizer": {"kind": self.optimizer.kind,
                          "step_count": self.optimizer.step_count},
            "encoder": self.encoder.meta(),
            "prequential": self.prequential.meta(),
            "extra": self.extra,
        }
        try:
            return snapshot.dump(arrays, meta)
        except (TypeError, ValueError) as exc:
            raise InvalidInputError(f"extra must be JSON without NaN: {exc}",
                                    field="extra") from exc

    def _hash_spec(self) -> str:
        self._spec_hash = spec_hash(self.spec)
        return self._spec_hash

    @classmethod
    def from_bytes(cls, data: bytes) -> Learner:
        """Rebuild a learner from `to_bytes`; SnapshotError if the bytes do not fit."""
        arrays, meta = snapshot.load(data)
        try:
            # Snapshots written before a rename carry the old spelling.
            spec = apply_defaults(upgrade_legacy_spec(meta["spec"]))
            if spec_hash(spec) != meta["spec_hash"]:
                raise SnapshotError("the snapshot's spec hash does not match its spec")

            def part(prefix: str) -> dict[str, NDArray[Any]]:
                return {k[len(prefix):]: v for k, v in arrays.items() if k.startswith(prefix)}

            encoder = Encoder.from_state(spec, part("encoder."), meta["encoder"])
            sizes = (encoder.n_inputs, *spec["hidden_layers"], encoder.n_outputs)
            if list(sizes) != meta["sizes"]:
                raise SnapshotError("the snapshot's layer sizes do not match its spec")
            params = arrays["params"]
            if params.dtype != np.float64 or not np.all(np.isfinite(params)):
                raise SnapshotError("the snapshot's parameters are not finite float64")
            network = Network(sizes, spec["activation"], OUTPUT_OF_TASK[spec["task"]], params)
            prequential = Prequential.from_state(part("prequential."), meta["prequential"])
            input_sum = np.array(arrays["input_sum"], dtype=np.float64)
            if input_sum.shape != (encoder.n_inputs,) or not np.all(np.isfinite(input_sum)):
                raise SnapshotError("the snapshot's input mean is malformed")
            learner = cls(spec, encoder, network, prequential=prequential,
                          records_seen=int(meta["records_seen"]), input_sum=input_sum,
                          input_count=int(meta["input_count"]), extra=meta["extra"])
            learner._spec_hash = meta["spec_hash"]  # checked against the spec above
            if learner.optimizer.kind != meta["optimizer"]["kind"]:
                raise SnapshotError("the snapshot's optimizer does not match its spec")
            learner.optimizer.load_state(part("optimizer."),
                                         int(meta["optimizer"]["step_count"]))
        except SnapshotError:
            raise
        except (KeyError, TypeError, ValueError, AttributeError, InvalidInputError) as exc:
            raise SnapshotError(f"the snapshot is incompatible: {exc}") from exc
        return learner
