"""Batch and streaming (prequential) metrics.

Classification: `accuracy`, `log_loss` (probabilities clipped to [eps, 1 - eps],
eps the float64 machine epsilon, as scikit-learn does), `macro_f1` (mean F1
over the classes that occur in the labels or the predictions, scikit-learn's
default), and `roc_auc` for binary tasks. Regression: `rmse`, `mae`, `r2`.
Every result holds `n`. A metric that is undefined on the data seen is left
out rather than reported as NaN (NaN is not JSON): `roc_auc` until both classes
occurred, `r2` below two records. R^2 of a constant target is 1.0 for a perfect
fit, else 0.0 (scikit-learn's convention).

Scores: binary (n, 1) probability of class 1; multiclass (n, k) probabilities;
regression (n, 1) values in the units of `y`. A binary record is predicted
class 1 when p > 0.5 (argmax of [1 - p, p], first index on a tie).

`Prequential` is the test-then-train form (Dawid 1984; Gama et al. 2013): each
record's score is taken before the network trains on it and folded into
running sums, so its result equals `batch_metrics` of the same scores, exactly
for counts and to rounding for sums, with one exception: its `roc_auc` comes
from a bounded histogram of 4096 bins in logit space (scores between about
1e-7 and 1 - 1e-7 resolved to 0.008 in logit), so it may differ from the exact
value by at most half the share of positive-negative pairs that fall in one bin.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from typing import Any

import numpy as np
from numpy.typing import NDArray

from .errors import InvalidInputError, SnapshotError

EPS = float(np.finfo(np.float64).eps)
_ONE_MINUS_EPS = 1.0 - EPS
AUC_BINS = 4096
_AUC_LOGIT_RANGE = 16.0
_BINS_PER_LOGIT = AUC_BINS / (2.0 * _AUC_LOGIT_RANGE)
_STATE_VERSION = 1


def _clip(p: float) -> float:
    return min(max(p, EPS), 1.0 - EPS)


def _classification(confusion: NDArray[np.int64], log_loss_sum: float) -> dict[str, float]:
    """Accuracy, log loss and macro F1 from a (true, predicted) confusion matrix."""
    n = int(confusion.sum())
    if n == 0:
        return {"n": 0.0}
    true_positive = np.diag(confusion).astype(np.float64)
    actual = confusion.sum(axis=1)
    predicted = confusion.sum(axis=0)
    present = (actual + predicted) > 0
    # F1 = 2 TP / (2 TP + FP + FN) and 2 TP + FP + FN = actual + predicted.
    f1 = 2.0 * true_positive[present] / (actual + predicted)[present]
    return {"n": float(n), "accuracy": float(true_positive.sum()) / n,
            "log_loss": log_loss_sum / n, "macro_f1": float(f1.mean())}


def _regression(n: int, abs_sum: float, sq_sum: float, y_m2: float) -> dict[str, float]:
    """RMSE, MAE and R^2 from the residual sums and the target's centred sum of squares."""
    if n == 0:
        return {"n": 0.0}
    result = {"n": float(n), "rmse": math.sqrt(sq_sum / n), "mae": abs_sum / n}
    if n >= 2:
        if y_m2 > 0.0:
            result["r2"] = 1.0 - sq_sum / y_m2
        else:
            result["r2"] = 1.0 if sq_sum == 0.0 else 0.0
    return result


def roc_auc(y: NDArray[Any], p: NDArray[np.float64]) -> float | None:
    """Exact ROC AUC as the Mann-Whitney U statistic over (P * N), ties counted
    one half via average ranks (Hanley & McNeil 1982). None with one class only."""
    positive = np.asarray(y) == 1
    n_pos = int(positive.sum())
    n_neg = positive.size - n_pos
    if n_pos == 0 or n_neg == 0:
        return None
    _, inverse, counts = np.unique(p, return_inverse=True, return_counts=True)
    # The average rank (1-based) of a run of equal scores: its last rank minus half its spread.
    average_rank = np.cumsum(counts) - (counts - 1) / 2.0
    rank_sum = float(average_rank[inverse][positive].sum())
    return float((rank_sum - n_pos * (n_pos + 1) / 2.0) / (n_pos * n_neg))


def batch_metrics(task: str, y: NDArray[Any], scores: NDArray[np.float64]) -> dict[str, float]:
    """Metrics of scores (see module docstring for shapes) against y: class
    indices (n,) for classification, raw values (n,) for regression."""
    y = np.asarray(y)
    scores = np.asarray(scores, dtype=np.float64)
    if scores.ndim != 2 or y.shape != (scores.shape[0],):
        raise InvalidInputError(f"y {y.shape} and scores {scores.shape} do not match")
    n = y.size
    if task == "regression":
        values = y.astype(np.float64)
        residual = values - scores[:, 0]
        y_m2 = float(np.sum((values - values.mean()) ** 2)) if n else 0.0
        return _regression(n, float(np.abs(residual).sum()), float(residual @ residual), y_m2)
    if task not in ("binary", "multiclass"):
        raise InvalidInputError(f"unknown task {task!r}", field="task")
    labels = y.astype(np.int64)
    k = 2 if task == "binary" else scores.shape[1]
    if n and (labels.min() < 0 or labels.max() >= k):
        raise InvalidInputError("a class index is outside the classes", field="label")
    if task == "binary":
        p = scores[:, 0]
        predicted = (p > 0.5).astype(np.int64)
        # The probability given to the true class, clipped as scikit-learn does.
        p_true = np.clip(np.where(labels == 1, p, 1.0 - p), EPS, 1.0 - EPS)
    else:
        predicted = np.argmax(scores, axis=1) if n else labels
        p_true = np.clip(scores[np.arange(n), labels], EPS, 1.0 - EPS)
    confusion = np.bincount(labels * k + predicted, minlength=k * k).reshape(k, k)
    result = _classification(confusion, float(-np.log(p_true).sum()))
    if task == "binary":
        auc = roc_auc(labels, scores[:, 0])
        if auc is not None:
            result["roc_auc"] = auc
    return result


def auc_bin_indices(p: NDArray[np.float64]) -> NDArray[np.int64]:
    """`Prequential._bin` of many probabilities at once."""
    p = np.asarray(p, dtype=np.float64)
    inside = np.clip(p, EPS, 1.0 - EPS)
    logit = np.log(inside) - np.log1p(-inside)
    position = np.floor((logit + _AUC_LOGIT_RANGE) * _BINS_PER_LOGIT)
    bins = np.clip(position, 0, AUC_BINS - 1).astype(np.int64)
    bins[p <= 0.0] = 0
    bins[p >= 1.0] = AUC_BINS - 1
    return bins


def auc_from_histogram(histogram: NDArray[np.int64]) -> float | None:
    """ROC AUC from (2, AUC_BINS) counts of class-0 and class-1 scores per bin;
    None until both classes occurred. Pairs in one bin count one half, as tied
    scores do."""
    negative, positive = np.asarray(histogram, dtype=np.float64)
    pairs = positive.sum() * negative.sum()
    if pairs <= 0:
        return None
    below = np.cumsum(negative) - negative
    return float(positive @ below + 0.5 * positive @ negative) / float(pairs)


class Prequential:
    """Running test-then-train metrics; `update` is the per-record hot path and
    allocates nothing (Python scalars and lists, no arrays)."""

    def __init__(self, task: str, n_classes: int) -> None:
        if task not in ("binary", "multiclass", "regression"):
            raise InvalidInputError(f"unknown task {task!r}", field="task")
        self.task = task
        self.n_classes = 2 if task == "binary" else (n_classes if task == "multiclass" else 0)
        k = self.n_classes
        if task == "multiclass" and k < 2:
            raise InvalidInputError("multiclass needs at least 2 classes", field="classes")
        self._confusion = [[0] * k for _ in range(k)]
        self._histogram = [[0] * AUC_BINS for _ in range(2)] if task == "binary" else []
        self._log_loss_sum = 0.0
        self.n = 0
        # Regression: residual sums and Welford's running moments of the target.
        self._abs_sum = 0.0
        self._sq_sum = 0.0
        self._y_mean = 0.0
        self._y_m2 = 0.0

    def update(self, y: Any, scores_row: NDArray[np.float64]) -> None:
        """Fold one record's score (taken before training on it) into the sums."""
        if self.task == "regression":
            self._update_value(y, float(scores_row[0]))
        elif self.task == "binary":
            self._update_binary(y, float(scores_row[0]))
        else:
            label = self._label(y)
            self.n += 1
            predicted = int(scores_row.argmax())
            self._log_loss_sum -= math.log(_clip(float(scores_row[label])))
            self._confusion[label][predicted] += 1

    def scalar_update(self) -> Callable[[Any, float], None]:
        """`update` for a single-output task taking the score as a float: f(y, score).

        The online trainer's per-record form: no score array is written and read back.
        """
        if self.task == "regression":
            return self._update_value
        if self.task == "binary":
            return self._update_binary
        raise InvalidInputError("a multiclass score is a row, not one number", field="task")

    def _label(self, y: Any) -> int:
        label = int(y)
        if not 0 <= label < self.n_classes:
            raise InvalidInputError(f"class index {label} is outside the classes", field="label")
        return label

    def _update_value(self, y: Any, score: float) -> None:
        value = float(y)
        self.n += 1
        residual = value - score
        self._abs_sum += abs(residual)
        self._sq_sum += residual * residual
        delta = value - self._y_mean
        self._y_mean += delta / self.n
        self._y_m2 += delta * (value - self._y_mean)

    def _update_binary(self, y: Any, p: float) -> None:
        label = int(y)
        if label != 0 and label != 1:
            raise InvalidInputError(f"class index {label} is outside the classes", field="label")
        self.n += 1
        # Clipped as _clip does, written out: this runs once per record.
        p_true = p if label == 1 else 1.0 - p
        self._log_loss_sum -= math.log(EPS if p_true < EPS else
                                       (_ONE_MINUS_EPS if p_true > _ONE_MINUS_EPS else p_true))
        # _bin(p), written out.
        if p <= 0.0:
            position = 0
        elif p >= 1.0:
            position = AUC_BINS - 1
        else:
            position = int((math.log(p) - math.log1p(-p) + _AUC_LOGIT_RANGE) * _BINS_PER_LOGIT)
            if position < 0:
                position = 0
            elif position >= AUC_BINS:
                position = AUC_BINS - 1
        self._histogram[label][position] += 1
        self._confusion[label][1 if p > 0.5 else 0] += 1

    @staticmethod
    def _bin(p: float) -> int:
        """The AUC histogram bin of a probability: equal widths in logit space."""
        if p <= 0.0:
            return 0
        if p >= 1.0:
            return AUC_BINS - 1
        logit = math.log(p) - math.log1p(-p)
        position = (logit + _AUC_LOGIT_RANGE) * _BINS_PER_LOGIT
        return min(max(int(position), 0), AUC_BINS - 1)

    def result(self) -> dict[str, float]:
        """The metrics of every record seen so far."""
        if self.task == "regression":
            return _regression(self.n, self._abs_sum, self._sq_sum, self._y_m2)
        result = _classification(np.array(self._confusion, dtype=np.int64), self._log_loss_sum)
        if self.task == "binary":
            auc = auc_from_histogram(np.array(self._histogram, dtype=np.int64))
            if auc is not None:
                result["roc_auc"] = auc
        return result

    # -------------------------------------------------------------------- state
    def arrays(self) -> dict[str, NDArray[Any]]:
        """The running sums as plain arrays (bit-exact through an npz snapshot)."""
        state: dict[str, NDArray[Any]] = {
            "count": np.array([self.n], dtype=np.int64),
            "sums": np.array([self._log_loss_sum, self._abs_sum, self._sq_sum,
                              self._y_mean, self._y_m2]),
        }
        if self.task != "regression":
            state["confusion"] = np.array(self._confusion, dtype=np.int64)
        if self.task == "binary":
            state["histogram"] = np.array(self._histogram, dtype=np.int64)
        return state

    def meta(self) -> dict[str, Any]:
        return {"version": _STATE_VERSION, "task": self.task, "n_classes": self.n_classes,
                "auc_bins": AUC_BINS}

    @classmethod
    def from_state(cls, arrays: dict[str, NDArray[Any]], meta: dict[str, Any]) -> Prequential:
        """Rebuild what `arrays()` and `meta()` saved; SnapshotError if it does not fit."""
        if meta.get("version") != _STATE_VERSION or meta.get("auc_bins") != AUC_BINS:
            raise SnapshotError("prequential state has an unknown version")
        try:
            metrics = cls(str(meta["task"]), int(meta["n_classes"]))
            k = metrics.n_classes
            count = np.asarray(arrays["count"])
            sums = np.asarray(arrays["sums"], dtype=np.float64)
            if count.shape != (1,) or sums.shape != (5,) or not np.all(np.isfinite(sums)):
                raise ValueError("count or sums malformed")
            metrics.n = int(count[0])
            (metrics._log_loss_sum, metrics._abs_sum, metrics._sq_sum,
             metrics._y_mean, metrics._y_m2) = sums.tolist()
            if metrics.task != "regression":
                confusion = np.asarray(arrays["confusion"], dtype=np.int64)
                if confusion.shape != (k, k) or int(confusion.sum()) != metrics.n:
                    raise ValueError("confusion matrix malformed")
                metrics._confusion = confusion.tolist()
            if metrics.task == "binary":
                histogram = np.asarray(arrays["histogram"], dtype=np.int64)
                if histogram.shape != (2, AUC_BINS) or int(histogram.sum()) != metrics.n:
                    raise ValueError("AUC histogram malformed")
                metrics._histogram = histogram.tolist()
        except (KeyError, TypeError, ValueError, InvalidInputError) as exc:
            raise SnapshotError(f"prequential state is corrupt: {exc}") from exc
        return metrics
