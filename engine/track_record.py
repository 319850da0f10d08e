"""The track record of served scores: live metrics from sums kept as outcomes
arrive, and a Page-Hinkley change alarm on the per-case loss.

A `Tally` holds sums, never cases: `Tally.of` folds a batch of (label, served
score) pairs in, `merged` adds two tallies, `metrics` and `calibration` read
them. So a summary over any number of days costs one merge per stored day and
does not grow with the cases behind them.

Scores follow engine.metrics: binary (n, 1) probability of class 1; multiclass
(n, k) probabilities; regression (n, 1) values. Labels are class indices (n,)
or values (n,).

Exact (to rounding): n, accuracy, log loss (clipped as scikit-learn does),
Brier score, the calibration table, RMSE, MAE and R^2 (target moments merged
with Chan, Golub & LeVeque's pairwise update). Approximate: ROC AUC, read from
the binned histogram of engine.metrics (AUC_BINS equal widths in logit space);
it may differ from the exact value by at most half the share of
positive-negative pairs that share a bin.

Brier score: binary, the mean of (p - y)^2 (scikit-learn's binary form);
multiclass, the mean over cases of the sum over classes of (p_k - y_k)^2
(Brier 1950). Calibration: 10 equal-width bins of the probability; binary bins
the probability of class 1 against the rate of class 1 (scikit-learn's
`calibration_curve`, strategy "uniform"), multiclass the probability of the
predicted class against the rate it was right (top-label calibration).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
from numpy.typing import NDArray

from engine.errors import InvalidInputError
from engine.metrics import AUC_BINS, EPS, auc_bin_indices, auc_from_histogram

CALIBRATION_BINS = 10
# The inner edges of the calibration bins; a probability on an edge goes to the
# lower bin, as numpy.searchsorted (side "left") puts it in calibration_curve.
_CALIBRATION_EDGES = np.linspace(0.0, 1.0, CALIBRATION_BINS + 1)[1:-1]
# A case's relative error (regression loss for the alarm) is capped here so a
# perfect run followed by one miss cannot dominate the test alone.
RELATIVE_ERROR_CAP = 100.0


def _empty_calibration() -> NDArray[np.float64]:
    return np.zeros((3, CALIBRATION_BINS))


@dataclass(frozen=True)
class Tally:
    """Sums of one stretch of outcomes (one version, one day, or a merge of them)."""

    task: str
    n: int = 0
    correct: int = 0
    log_loss_sum: float = 0.0
    brier_sum: float = 0.0
    # Rows: count, sum of predicted probability, sum of observed (0/1), per bin.
    calibration: NDArray[np.float64] = field(default_factory=_empty_calibration)
    # Binary only: (2, AUC_BINS) counts of class-0 and class-1 scores per logit bin.
    auc_histogram: NDArray[np.int64] | None = None
    abs_sum: float = 0.0
    sq_sum: float = 0.0
    y_mean: float = 0.0
    y_m2: float = 0.0

    @classmethod
    def of(cls, task: str, y: NDArray[Any], scores: NDArray[np.float64]) -> Tally:
        """The sums of one batch of labels and the scores served for them."""
        y = np.asarray(y)
        scores = np.asarray(scores, dtype=np.float64)
        if scores.ndim != 2 or y.shape != (scores.shape[0],):
            raise InvalidInputError(f"y {y.shape} and scores {scores.shape} do not match")
        n = y.size
        if task == "regression":
            values = y.astype(np.float64)
            residual = values - scores[:, 0]
            mean = float(values.mean()) if n else 0.0
            return cls(task, n=n, abs_sum=float(np.abs(residual).sum()),
                       sq_sum=float(residual @ residual), y_mean=mean,
                       y_m2=float(((values - mean) ** 2).sum()))
        if task not in ("binary", "multiclass"):
            raise InvalidInputError(f"unknown task {task!r}", field="task")
        labels = y.astype(np.int64)
        if task == "binary":
            p = scores[:, 0]
            truth = (labels == 1).astype(np.float64)
            correct = int(((p > 0.5) == (labels == 1)).sum())
            p_true = np.where(labels == 1, p, 1.0 - p)
            brier = float(((p - truth) ** 2).sum())
            confidence, hit = p, truth
            histogram = np.zeros((2, AUC_BINS), dtype=np.int64)
            np.add.at(histogram, (labels, auc_bin_indices(p)), 1)
        else:
            rows = np.arange(n)
            predicted = np.argmax(scores, axis=1)
            correct = int((predicted == labels).sum())
            p_true = scores[rows, labels]
            onehot = np.zeros_like(scores)
            onehot[rows, labels] = 1.0
            brier = float(((scores - onehot) ** 2).sum())
            confidence = scores[rows, predicted]
            hit = (predicted == labels).astype(np.float64)
            histogram = None
        bins = np.searchsorted(_CALIBRATION_EDGES, confidence)
        calibration = np.stack([
            np.bincount(bins, minlength=CALIBRATION_BINS).astype(np.float64),
            np.bincount(bins, weights=confidence, minlength=CALIBRATION_BINS),
            np.bincount(bins, weights=hit, minlength=CALIBRATION_BINS)])
        log_loss = float(-np.log(np.clip(p_true, EPS, 1.0 - EPS)).sum())
        return cls(task, n=n, correct=correct, log_loss_sum=log_loss, brier_sum=brier,
                   calibration=calibration, auc_histogram=histogram)

    def merged(self, other: Tally) -> Tally:
        """The sums of both stretches together."""
        if other.task != self.task:
            raise InvalidInputError("tallies of different tasks do not merge", field="task")
        n = self.n + other.n
        if n == 0:
            return self
        # Chan, Golub & LeVeque (1979): the pairwise update of mean and M2.
        delta = other.y_mean - self.y_mean
        mean = self.y_mean + delta * other.n / n
        m2 = self.y_m2 + other.y_m2 + delta * delta * self.n * other.n / n
        histogram = self.auc_histogram
        if other.auc_histogram is not None:
            histogram = (other.auc_histogram if histogram is None
                         else histogram + other.auc_histogram)
        return replace(self, n=n, correct=self.correct + other.correct,
                       log_loss_sum=self.log_loss_sum + other.log_loss_sum,
                       brier_sum=self.brier_sum + other.brier_sum,
                       calibration=self.calibration + other.calibration,
                       auc_histogram=histogram, abs_sum=self.abs_sum + other.abs_sum,
                       sq_sum=self.sq_sum + other.sq_sum, y_mean=mean, y_m2=m2)

    def without(self, part: Tally) -> Tally:
        """The sums of this stretch with ``part`` (a stretch inside it) taken
        out: the inverse of `merged`, so ``a.merged(b).without(b)`` is ``a``
        to rounding (counts exactly). Used when outcomes are forgotten."""
        if part.task != self.task:
            raise InvalidInputError("tallies of different tasks do not merge", field="task")
        n = self.n - part.n
        if n < 0:
            raise InvalidInputError("cannot take out more outcomes than a tally holds")
        if n == 0:
            return Tally(self.task)
        # Chan, Golub & LeVeque's pairwise update solved for the other half.
        mean = (self.n * self.y_mean - part.n * part.y_mean) / n
        delta = part.y_mean - mean
        m2 = max(0.0, self.y_m2 - part.y_m2 - delta * delta * n * part.n / self.n)
        histogram = self.auc_histogram
        if histogram is not None and part.auc_histogram is not None:
            histogram = histogram - part.auc_histogram
        return replace(self, n=n, correct=self.correct - part.correct,
                       log_loss_sum=self.log_loss_sum - part.log_loss_sum,
                       brier_sum=self.brier_sum - part.brier_sum,
                       calibration=self.calibration - part.calibration,
                       auc_histogram=histogram, abs_sum=self.abs_sum - part.abs_sum,
                       sq_sum=self.sq_sum - part.sq_sum, y_mean=mean, y_m2=m2)

    def metrics(self) -> dict[str, float]:
        """n and the task's metrics; a metric undefined on these outcomes is left out."""
        n = self.n
        if n == 0:
            return {"n": 0}
        if self.task == "regression":
            result: dict[str, float] = {"n": n, "rmse": math.sqrt(self.sq_sum / n),
                                        "mae": self.abs_sum / n}
            if n >= 2:
                result["r2"] = (1.0 - self.sq_sum / self.y_m2 if self.y_m2 > 0.0
                                else (1.0 if self.sq_sum == 0.0 else 0.0))
            return result
        result = {"n": n, "accuracy": self.correct / n, "log_loss": self.log_loss_sum / n,
                  "brier": self.brier_sum / n}
        if self.auc_histogram is not None:
            auc = auc_from_histogram(self.auc_histogram)
            if auc is not None:
                result["roc_auc"] = auc
        return result

    def main_metric(self) -> float | None:
        """The daily series' metric: log loss for classification, RMSE for regression."""
        if self.n == 0:
            return None
        if self.task == "regression":
            return math.sqrt(self.sq_sum / self.n)
        return self.log_loss_sum / self.n

    def calibration_table(self) -> list[dict[str, Any]]:
        """Per bin: its edges, count, mean predicted and observed rate (None when empty)."""
        if self.task == "regression":
            return []
        table = []
        for b in range(CALIBRATION_BINS):
            count, predicted, observed = self.calibration[:, b].tolist()
            table.append({
                "lower": b / CALIBRATION_BINS, "upper": (b + 1) / CALIBRATION_BINS,
                "count": int(count),
                "mean_predicted": predicted / count if count else None,
                "observed_rate": observed / count if count else None,
            })
        return table


def case_losses(task: str, y: NDArray[Any], scores: NDArray[np.float64]) -> NDArray[np.float64]:
    """Each case's loss for the alarm. Classification: its Brier term (bounded:
    [0, 1] binary, [0, 2] multiclass). Regression: its absolute error in label
    units (`relative_errors` makes it scale-free)."""
    y = np.asarray(y)
    scores = np.asarray(scores, dtype=np.float64)
    if task == "regression":
        losses = np.abs(y.astype(np.float64) - scores[:, 0])
    elif task == "binary":
        losses = (scores[:, 0] - (y.astype(np.int64) == 1)) ** 2
    else:
        labels = y.astype(np.int64)
        onehot = np.zeros_like(scores)
        onehot[np.arange(labels.size), labels] = 1.0
        losses = ((scores - onehot) ** 2).sum(axis=1)
    return np.asarray(losses, dtype=np.float64)


@dataclass(frozen=True)
class AlarmState:
    """A Page-Hinkley test in progress (Page 1954; Hinkley 1971).

    With x_t the t-th loss and xbar_t the mean of x_1..x_t, the cumulative sum
    m_t = sum_{i<=t} (x_i - xbar_i - delta) drifts down by delta per case while
    the mean loss holds and climbs once it moves up; the statistic
    m_t - min_{i<=t} m_i crossing `threshold` raises the alarm. It then stays
    raised (latched): the version has got worse.
    """

    n: int = 0
    mean: float = 0.0
    cumulative: float = 0.0
    minimum: float = 0.0
    # Regression: the sum of absolute errors so far, the scale relative errors use.
    error_sum: float = 0.0
    raised_at: int | None = None  # how many cases had been seen when it raised

    @property
    def statistic(self) -> float:
        return self.cumulative - self.minimum


def relative_errors(state: AlarmState, errors: NDArray[np.float64]) -> NDArray[np.float64]:
    """Absolute errors over the mean absolute error of the cases before each
    (1.0 for the very first case), capped at RELATIVE_ERROR_CAP."""
    errors = np.asarray(errors, dtype=np.float64)
    before = state.error_sum + np.cumsum(errors) - errors
    seen = state.n + np.arange(errors.size, dtype=np.float64)
    scale = np.divide(before, seen, out=np.zeros_like(errors), where=seen > 0)
    ratio = np.divide(errors, scale, out=np.full_like(errors, RELATIVE_ERROR_CAP),
                      where=scale > 0)
    ratio[(seen == 0) | ((scale == 0) & (errors == 0))] = 1.0
    return np.asarray(np.minimum(ratio, RELATIVE_ERROR_CAP), dtype=np.float64)


def page_hinkley(state: AlarmState, losses: NDArray[np.float64], delta: float,
                 threshold: float, *, errors: NDArray[np.float64] | None = None
                 ) -> AlarmState:
    """The test after `losses` (in outcome order); vectorised, one pass.
    `errors`: the raw absolute errors behind relative losses, kept for their scale."""
    x = np.asarray(losses, dtype=np.float64)
    if x.size == 0:
        return state
    counts = state.n + np.arange(1, x.size + 1, dtype=np.float64)
    means = (state.mean * state.n + np.cumsum(x)) / counts
    cumulative = state.cumulative + np.cumsum(x - means - delta)
    minimum = np.minimum.accumulate(np.minimum(cumulative, state.minimum))
    raised_at = state.raised_at
    if raised_at is None:
        above = np.flatnonzero(cumulative - minimum > threshold)
        if above.size:
            raised_at = state.n + int(above[0]) + 1
    error_sum = state.error_sum + (float(np.sum(errors)) if errors is not None else 0.0)
    return AlarmState(n=state.n + x.size, mean=float(means[-1]),
                      cumulative=float(cumulative[-1]), minimum=float(minimum[-1]),
                      error_sum=error_sum, raised_at=raised_at)
