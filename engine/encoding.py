"""Raw records to network inputs and labels to targets, and back.

Policy for a stream (frozen once made, stored in every snapshot so a trained
network's inputs never shift): a numeric field is standardised with the mean
and population standard deviation of the warm-up rows (Welford's running
moments); with fewer than two distinct warm-up values it falls back to its
declared bounds (centre, half-range), then to centre 0, scale 1. Categorical
fields are one-hot in declared level order, booleans 0/1 (columns left
unscaled). Regression targets are standardised the same way from the warm-up
labels (fewer than two distinct: their mean if any, scale 1).
"""

from __future__ import annotations

import math
import operator
from collections.abc import Iterable, Mapping, Sequence
from itertools import chain
from typing import Any

import numpy as np
from numpy.typing import NDArray

from .errors import InvalidInputError, SnapshotError

TASKS = ("binary", "multiclass", "regression")
_KINDS = ("numeric", "categorical", "boolean")
_STATE_VERSION = 1
_NUMERIC, _BOOLEAN, _CATEGORICAL = 0, 1, 2
_KIND_CODE = {"numeric": _NUMERIC, "boolean": _BOOLEAN, "categorical": _CATEGORICAL}


def _exact_key(value: Any) -> tuple[type, Any]:
    """A dictionary key that tells True from 1 and 1.0 from 1 (they hash alike)."""
    return (type(value), value)


def _is_real(value: Any) -> bool:
    """A JSON number: int or float (NumPy scalars too), never a boolean."""
    if isinstance(value, bool | np.bool_):
        return False
    return isinstance(value, int | float | np.integer | np.floating)


class RunningMoments:
    """Welford's (1962) one-pass mean and variance, column-wise over rows.

    `push` mutates the running state; `mean` and `variance` (population, as
    numpy.var with ddof=0) read it. `distinct` is False while every row pushed so
    far equals the first one in that column.
    """

    def __init__(self, width: int) -> None:
        self.count = 0
        self.mean = np.zeros(width)
        self._m2 = np.zeros(width)
        self._first = np.zeros(width)
        self.distinct = np.zeros(width, dtype=bool)

    def push(self, row: NDArray[np.float64]) -> None:
        """Add one row of shape (width,)."""
        self.count += 1
        if self.count == 1:
            self._first[:] = row
        else:
            self.distinct |= row != self._first
        delta = row - self.mean
        self.mean += delta / self.count
        # The second factor uses the updated mean: Welford's recurrence.
        self._m2 += delta * (row - self.mean)

    @property
    def variance(self) -> NDArray[np.float64]:
        if self.count == 0:
            return np.zeros_like(self._m2)
        return self._m2 / self.count


class Encoder:
    """The frozen mapping between a model spec's fields and network columns.

    Columns follow the declared feature order; a categorical field takes one
    column per level. `encoded = (raw - center) / scale` column-wise, with
    center 0 and scale 1 on categorical and boolean columns.
    """

    def __init__(
        self,
        spec: Mapping[str, Any],
        center: NDArray[np.float64] | None = None,
        scale: NDArray[np.float64] | None = None,
        target_center: float = 0.0,
        target_scale: float = 1.0,
    ) -> None:
        task = spec.get("task")
        if task not in TASKS:
            raise InvalidInputError(f"task must be one of {TASKS}, got {task!r}", field="task")
        self.task: str = task
        features = spec.get("features")
        if not isinstance(features, Sequence) or not features:
            raise InvalidInputError("features must be a non-empty list", field="features")
        names: list[str] = []
        self.levels: dict[str, list[Any]] = {}
        self._level_index: dict[str, dict[tuple[type, Any], int]] = {}
        starts: list[int] = []
        column_field: list[int] = []
        bounds: list[tuple[float | None, float | None]] = []
        kinds: list[str] = []
        for index, feature in enumerate(features):
            name, kind = feature.get("name"), feature.get("type")
            if not isinstance(name, str) or name in names:
                raise InvalidInputError(f"feature name {name!r} is missing or repeated",
                                        field=f"features.{index}.name")
            if kind not in _KINDS:
                raise InvalidInputError(f"feature type must be one of {_KINDS}, got {kind!r}",
                                        field=f"features.{index}.type")
            width = 1
            if kind == "categorical":
                levels = list(feature.get("levels") or ())
                index_of = {_exact_key(level): i for i, level in enumerate(levels)}
                if not levels or len(index_of) != len(levels):
                    raise InvalidInputError("levels must be a non-empty list without repeats",
                                            field=f"features.{index}.levels")
                self.levels[name] = levels
                self._level_index[name] = index_of
                width = len(levels)
            names.append(name)
            kinds.append(kind)
            starts.append(len(column_field))
            column_field.extend([index] * width)
            bounds.append((feature.get("min"), feature.get("max")))
        self.fields: tuple[str, ...] = tuple(names)
        self.kinds: tuple[str, ...] = tuple(kinds)
        self._field_index = {name: i for i, name in enumerate(names)}
        self._starts = np.array(starts, dtype=np.intp)
        self._bounds = bounds
        self.n_inputs: int = len(column_field)
        self.column_field: NDArray[np.int64] = np.array(column_field, dtype=np.int64)
        self.column_numeric: NDArray[np.bool_] = np.array(
            [kinds[f] == "numeric" for f in column_field], dtype=bool)
        self.all_numeric: bool = all(kind == "numeric" for kind in kinds)
        # Every field's value of a row in one C call (a scalar for a single field).
        self._values_of = operator.itemgetter(*names)
        # (name, kind code, first column, level index) per field, for encode.
        self._plan = [(name, _KIND_CODE[kind], start, self._level_index.get(name, {}))
                      for name, kind, start in zip(names, kinds, starts, strict=True)]
        # (name, first column, level names or None) per field, for raw_baseline.
        self._layout = [(name, start, [str(v) for v in self.levels[name]]
                         if name in self.levels else None)
                        for name, start in zip(names, starts, strict=True)]

        self.classes: list[Any] = []
        self._class_index: dict[tuple[type, Any], int] = {}
        if task != "regression":
            classes = spec.get("classes")
            if classes is None and task == "binary":
                classes = [False, True]
            if not isinstance(classes, Sequence) or isinstance(classes, str):
                raise InvalidInputError("classes must be a list", field="classes")
            self.classes = list(classes)
            try:
                self._class_index = {_exact_key(c): i for i, c in enumerate(self.classes)}
            except TypeError as exc:
                raise InvalidInputError("classes must be strings, integers or booleans",
                                        field="classes") from exc
            wanted_two = task == "binary"
            if len(self._class_index) != len(self.classes) or (
                    len(self.classes) != 2 if wanted_two else len(self.classes) < 2):
                raise InvalidInputError(
                    "binary needs exactly 2 classes, multiclass at least 2, without repeats",
                    field="classes")
        self.n_outputs: int = len(self.classes) if task == "multiclass" else 1

        self.center = np.zeros(self.n_inputs) if center is None else center
        self.scale = np.ones(self.n_inputs) if scale is None else scale
        self.target_center = float(target_center)
        self.target_scale = float(target_scale)

    # ----------------------------------------------------------------- creation
    @classmethod
    def from_spec(
        cls,
        spec: Mapping[str, Any],
        warmup: Iterable[Mapping[str, Any]] = (),
        warmup_labels: Iterable[Any] = (),
    ) -> Encoder:
        """Build the encoder and freeze its statistics from the warm-up rows.

        Warm-up rows and labels are validated like any other input.
        """
        encoder = cls(spec)
        rows = list(warmup)
        numeric = np.flatnonzero(encoder.column_numeric)
        moments = RunningMoments(numeric.size)
        if rows:
            raw = encoder.encode(rows)  # center 0, scale 1 so far: raw values
            for row in raw[:, numeric]:
                moments.push(row)
        std = np.sqrt(moments.variance)
        for k, column in enumerate(numeric):
            if moments.distinct[k] and std[k] > 0.0:
                encoder.center[column], encoder.scale[column] = moments.mean[k], std[k]
                continue
            low, high = encoder._bounds[encoder.column_field[column]]
            if _is_real(low) and _is_real(high) and float(high) > float(low):
                encoder.center[column] = (float(high) + float(low)) / 2.0
                encoder.scale[column] = (float(high) - float(low)) / 2.0
        if encoder.task == "regression":
            labels = list(warmup_labels)
            if labels:
                targets = encoder.encode_labels(labels)  # standardised with 0 and 1: raw
                target_moments = RunningMoments(1)
                for value in targets:
                    target_moments.push(np.array([value]))
                encoder.target_center = float(target_moments.mean[0])
                spread = math.sqrt(float(target_moments.variance[0]))
                if target_moments.distinct[0] and spread > 0.0:
                    encoder.target_scale = spread
        return encoder

    # ----------------------------------------------------------------- encoding
    def _fail(self, message: str, field: str | None, row: int) -> InvalidInputError:
        return InvalidInputError(f"row {row}: {message}", field=field)

    def encode(self, rows: Sequence[Mapping[str, Any]]) -> NDArray[np.float64]:
        """Rows of {field: raw value} -> (n, n_inputs) float64 network inputs.

        Values are gathered into one flat Python list and converted once: per-item
        stores into a NumPy array cost several times more than list stores.
        """
        if self.all_numeric:
            fast = self._encode_numeric(rows)
            if fast is not None:
                return fast
        n_fields, width = len(self.fields), self.n_inputs
        data = [0.0] * (len(rows) * width)
        base = 0
        for r, row in enumerate(rows):
            if not isinstance(row, Mapping):
                raise self._fail("a record must be a mapping of field to value", None, r)
            for name, kind, column, index_of in self._plan:
                try:
                    value = row[name]
                except KeyError:
                    raise self._fail(f"field {name!r} is missing", name, r) from None
                if kind == _NUMERIC:
                    if type(value) is not float:  # the common case skips the checks below
                        if not _is_real(value):
                            raise self._fail(f"{name} must be a number", name, r)
                        try:
                            value = float(value)
                        except OverflowError:
                            value = math.inf
                    if not math.isfinite(value):
                        raise self._fail(f"{name} must be finite", name, r)
                    data[base + column] = value
                elif kind == _BOOLEAN:
                    if value is True or value is False or isinstance(value, np.bool_):
                        data[base + column] = 1.0 if value else 0.0
                    else:
                        raise self._fail(f"{name} must be true or false", name, r)
                else:
                    try:
                        data[base + column + index_of[(type(value), value)]] = 1.0
                    except (KeyError, TypeError):
                        raise self._fail(f"{name}: unknown level {value!r}", name, r) from None
            if len(row) != n_fields:
                unknown = next(key for key in row if key not in self._field_index)
                raise self._fail(f"unknown field {unknown!r}", str(unknown), r)
            base += width
        out = np.array(data, dtype=np.float64).reshape(len(rows), width)
        out -= self.center
        out /= self.scale
        return out

    def _encode_numeric(self, rows: Sequence[Mapping[str, Any]]) -> NDArray[np.float64] | None:
        """`encode` when every field is numeric, without a Python step per value:
        rows gathered by one itemgetter, types checked as one set, converted in
        one call. None when any row needs a closer look (not a mapping, a field
        missing or extra, a value not an int or float, or not finite): the
        general path then finds it and names it, so errors are the same."""
        n_fields = len(self.fields)
        try:
            if not rows or set(map(len, rows)) != {n_fields}:
                return None
            values = list(map(self._values_of, rows))
        except (KeyError, TypeError):
            return None
        flat: Iterable[Any] = chain.from_iterable(values) if n_fields > 1 else values
        if not set(map(type, flat)) <= {float, int}:
            return None
        try:
            out = np.array(values, dtype=np.float64).reshape(len(rows), n_fields)
        except OverflowError:  # an int beyond float range
            return None
        if not np.isfinite(out).all():
            return None
        out -= self.center
        out /= self.scale
        return out

    def encode_labels(self, labels: Sequence[Any]) -> NDArray[Any]:
        """Labels -> (n,) int64 class indices, or (n,) standardised float64 targets."""
        if self.task == "regression":
            values = np.empty(len(labels))
            for i, label in enumerate(labels):
                try:
                    value = float(label) if _is_real(label) else math.nan
                except OverflowError:
                    value = math.inf
                if not math.isfinite(value):
                    raise InvalidInputError(f"row {i}: label must be a finite number",
                                            field="label")
                values[i] = value
            values -= self.target_center
            values /= self.target_scale
            return values
        indices = np.empty(len(labels), dtype=np.int64)
        for i, label in enumerate(labels):
            try:
                indices[i] = self._class_index[_exact_key(label)]
            except (KeyError, TypeError):
                raise InvalidInputError(f"row {i}: label {label!r} is not one of the classes "
                                        f"{self.classes!r}", field="label") from None
        return indices

    def label_of(self, index: int) -> Any:
        """The class label at a class index."""
        return self.classes[index]

    def decode_values(self, values: NDArray[np.float64]) -> NDArray[np.float64]:
        """Standardised regression outputs -> raw target units."""
        return values * self.target_scale + self.target_center

    # ----------------------------------------------------- columns back to fields
    def group(self, columns: NDArray[np.float64]) -> NDArray[np.float64]:
        """(..., n_inputs) -> (..., n_fields): each field's columns summed."""
        return np.add.reduceat(columns, self._starts, axis=-1)

    def numeric_span(self, name: str, spread: float) -> tuple[float, float]:
        """A numeric field's declared range; a bound not declared is the learned
        mean -/+ ``spread`` SDs (or spans 2 ``spread`` SDs from the declared one)."""
        index = self._field_index[name]
        if self.kinds[index] != "numeric":
            raise InvalidInputError("not a numeric field", field=name)
        low, high = self._bounds[index]
        column = int(self._starts[index])
        center, scale = float(self.center[column]), spread * float(self.scale[column])
        lower, upper = (center - scale if low is None else float(low),
                        center + scale if high is None else float(high))
        if upper <= lower:
            return (lower, lower + 2 * scale) if low is not None else (upper - 2 * scale, upper)
        return lower, upper

    def raw_baseline(self, encoded_row: NDArray[np.float64]) -> dict[str, Any]:
        """An encoded row in raw terms: numeric in raw units, a boolean as the
        share of true, a categorical field as {level: share}."""
        raw = (encoded_row * self.scale + self.center).tolist()
        if self.all_numeric:
            return dict(zip(self.fields, raw, strict=True))
        result: dict[str, Any] = {}
        for name, start, levels in self._layout:
            if levels is None:
                result[name] = raw[start]
            else:
                result[name] = dict(zip(levels, raw[start:start + len(levels)], strict=True))
        return result

    # -------------------------------------------------------------------- state
    def arrays(self) -> dict[str, NDArray[np.float64]]:
        """The frozen statistics as plain arrays (for an npz snapshot)."""
        return {"center": self.center.copy(), "scale": self.scale.copy(),
                "target": np.array([self.target_center, self.target_scale])}

    def meta(self) -> dict[str, Any]:
        """JSON-able description used to check a snapshot against its spec."""
        return {"version": _STATE_VERSION, "fields": list(self.fields),
                "n_inputs": self.n_inputs, "n_outputs": self.n_outputs}

    @classmethod
    def from_state(cls, spec: Mapping[str, Any], arrays: Mapping[str, NDArray[Any]],
                   meta: Mapping[str, Any]) -> Encoder:
        """Rebuild the encoder saved by `arrays()` and `meta()`; SnapshotError if
        the state does not fit the spec."""
        shell = cls(spec)
        if meta.get("version") != _STATE_VERSION or meta.get("fields") != list(shell.fields) \
                or meta.get("n_inputs") != shell.n_inputs:
            raise SnapshotError("encoder state does not match the model spec")
        try:
            center = np.asarray(arrays["center"], dtype=np.float64)
            scale = np.asarray(arrays["scale"], dtype=np.float64)
            target = np.asarray(arrays["target"], dtype=np.float64)
        except (KeyError, TypeError, ValueError) as exc:
            raise SnapshotError(f"encoder state incomplete: {exc}") from exc
        shapes_ok = center.shape == scale.shape == (shell.n_inputs,) and target.shape == (2,)
        values = np.concatenate([center, scale, target]) if shapes_ok else center
        if not shapes_ok or not np.all(np.isfinite(values)) or np.any(scale <= 0) \
                or target[1] <= 0:
            raise SnapshotError("encoder state has wrong shapes or non-finite values")
        return cls(spec, center.copy(), scale.copy(), float(target[0]), float(target[1]))
