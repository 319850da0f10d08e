"""Live metrics from stored sums against scikit-learn on the same served scores.

Reference library: scikit-learn's `metrics` (`roc_auc_score`, `log_loss`,
`brier_score_loss`, `accuracy_score`, `mean_squared_error`, `mean_absolute_error`,
`r2_score`) and `calibration.calibration_curve`. Data: scores of models fitted on
datasets shipped with scikit-learn, split into "days" and merged as the service does.
"""

from __future__ import annotations

import numpy as np
import pytest
from sklearn import metrics as skm
from sklearn.calibration import calibration_curve
from sklearn.datasets import load_breast_cancer, load_diabetes, load_iris
from sklearn.linear_model import LinearRegression, LogisticRegression

from engine.metrics import roc_auc
from engine.track_record import Tally
from tests.reference.test_metrics_reference import held_out_scores


def by_days(task: str, y: np.ndarray, scores: np.ndarray, days: int = 9) -> Tally:
    tally = Tally(task)
    for part in np.array_split(np.arange(y.size), days):
        tally = tally.merged(Tally.of(task, y[part], scores[part]))
    return tally


def test_binary_live_metrics_equal_scikit_learn() -> None:
    # Breast Cancer Wisconsin (Street, Wolberg & Mangasarian 1993), shipped with scikit-learn.
    y, proba = held_out_scores(load_breast_cancer, LogisticRegression(C=0.05))
    p = proba[:, 1]
    result = by_days("binary", y, p[:, None]).metrics()
    assert result["n"] == y.size
    assert result["accuracy"] == pytest.approx(skm.accuracy_score(y, p > 0.5))
    assert result["log_loss"] == pytest.approx(skm.log_loss(y, p), rel=1e-12)
    assert result["brier"] == pytest.approx(skm.brier_score_loss(y, p), rel=1e-12)
    # ROC AUC is read from the logit histogram (engine.metrics): within half the
    # share of pairs sharing a bin of the exact value.
    assert result["roc_auc"] == pytest.approx(skm.roc_auc_score(y, p), abs=2e-3)
    assert roc_auc(y, p) == pytest.approx(skm.roc_auc_score(y, p), rel=1e-12)


def test_binary_calibration_table_equals_scikit_learn_calibration_curve() -> None:
    y, proba = held_out_scores(load_breast_cancer, LogisticRegression(C=0.05))
    p = proba[:, 1]
    # Put scores on bin edges too: calibration_curve sends an edge to the lower bin.
    p = np.concatenate([p, [0.1, 0.5, 0.9, 0.0, 1.0]])
    y = np.concatenate([y, [0, 1, 1, 0, 1]])
    table = by_days("binary", y, p[:, None]).calibration_table()
    observed, predicted = calibration_curve(y, p, n_bins=10, strategy="uniform")
    filled = [row for row in table if row["count"]]
    assert [row["observed_rate"] for row in filled] == pytest.approx(observed, rel=1e-12)
    assert [row["mean_predicted"] for row in filled] == pytest.approx(predicted, rel=1e-12)
    assert sum(row["count"] for row in table) == y.size
    assert [row["lower"] for row in table] == pytest.approx(np.arange(10) / 10)


def test_multiclass_live_metrics_equal_scikit_learn() -> None:
    # Iris (Fisher 1936), shipped with scikit-learn. The multiclass Brier score is the
    # mean of the squared distance to the one-hot label (Brier 1950), as
    # scikit-learn's brier_score_loss computes it for more than two classes.
    y, proba = held_out_scores(load_iris, LogisticRegression(C=0.1))
    result = by_days("multiclass", y, proba).metrics()
    assert result["accuracy"] == pytest.approx(skm.accuracy_score(y, proba.argmax(axis=1)))
    assert result["log_loss"] == pytest.approx(skm.log_loss(y, proba), rel=1e-12)
    assert result["brier"] == pytest.approx(skm.brier_score_loss(y, proba), rel=1e-12)
    assert "roc_auc" not in result


def test_multiclass_calibration_is_top_label_calibration_curve() -> None:
    y, proba = held_out_scores(load_iris, LogisticRegression(C=0.1))
    table = by_days("multiclass", y, proba).calibration_table()
    confidence = proba.max(axis=1)
    right = (proba.argmax(axis=1) == y).astype(int)
    observed, predicted = calibration_curve(right, confidence, n_bins=10)
    filled = [row for row in table if row["count"]]
    assert [row["observed_rate"] for row in filled] == pytest.approx(observed, rel=1e-12)
    assert [row["mean_predicted"] for row in filled] == pytest.approx(predicted, rel=1e-12)


def test_regression_live_metrics_equal_scikit_learn() -> None:
    # Diabetes (Efron et al. 2004), shipped with scikit-learn.
    y, values = held_out_scores(load_diabetes, LinearRegression())
    result = by_days("regression", y, values).metrics()
    assert result["rmse"] == pytest.approx(
        np.sqrt(skm.mean_squared_error(y, values[:, 0])), rel=1e-12)
    assert result["mae"] == pytest.approx(skm.mean_absolute_error(y, values[:, 0]), rel=1e-12)
    assert result["r2"] == pytest.approx(skm.r2_score(y, values[:, 0]), rel=1e-10)
