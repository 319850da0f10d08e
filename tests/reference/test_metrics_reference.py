"""Metrics against outside references: scikit-learn's `metrics` and the
Mann-Whitney statistic (scipy), on scores from scikit-learn's bundled datasets."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.stats import mannwhitneyu
from sklearn import metrics as skm
from sklearn.datasets import load_breast_cancer, load_diabetes, load_iris
from sklearn.linear_model import LinearRegression, LogisticRegression
from sklearn.model_selection import train_test_split
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler

from engine.metrics import Prequential, batch_metrics, roc_auc


def held_out_scores(loader, model):  # type: ignore[no-untyped-def]
    X, y = loader(return_X_y=True)
    X_train, X_test, y_train, y_test = train_test_split(X, y, test_size=0.4, random_state=0)
    fitted = make_pipeline(StandardScaler(), model).fit(X_train, y_train)
    if hasattr(fitted, "predict_proba"):
        return y_test, fitted.predict_proba(X_test)
    return y_test, fitted.predict(X_test)[:, None]


def stream(task: str, y: np.ndarray, scores: np.ndarray) -> dict[str, float]:
    metrics = Prequential(task, scores.shape[1])
    for label, row in zip(y, scores, strict=True):
        metrics.update(label, row)
    return metrics.result()


def test_binary_metrics_equal_scikit_learn_on_breast_cancer_scores() -> None:
    # Data: Breast Cancer Wisconsin (Street, Wolberg & Mangasarian 1993), shipped
    # with scikit-learn. Reference library: scikit-learn's metrics.
    y, proba = held_out_scores(load_breast_cancer, LogisticRegression(C=0.05))
    p = proba[:, 1:]
    for result in (batch_metrics("binary", y, p), stream("binary", y, p)):
        assert result["n"] == y.size
        assert result["accuracy"] == pytest.approx(skm.accuracy_score(y, p[:, 0] > 0.5))
        assert result["log_loss"] == pytest.approx(skm.log_loss(y, p[:, 0], labels=[0, 1]),
                                                   rel=1e-12)
        assert result["macro_f1"] == pytest.approx(
            skm.f1_score(y, (p[:, 0] > 0.5).astype(int), average="macro"), rel=1e-12)
    exact = batch_metrics("binary", y, p)["roc_auc"]
    assert exact == pytest.approx(skm.roc_auc_score(y, p[:, 0]), rel=1e-12)
    # The streaming AUC is binned (engine.metrics docstring): close, not equal.
    assert stream("binary", y, p)["roc_auc"] == pytest.approx(exact, abs=2e-3)


def test_multiclass_metrics_equal_scikit_learn_on_iris_scores() -> None:
    # Data: Iris (Fisher 1936), shipped with scikit-learn. Reference: scikit-learn.
    y, proba = held_out_scores(load_iris, LogisticRegression(C=0.1))
    predicted = proba.argmax(axis=1)
    for result in (batch_metrics("multiclass", y, proba), stream("multiclass", y, proba)):
        assert result["accuracy"] == pytest.approx(skm.accuracy_score(y, predicted))
        assert result["log_loss"] == pytest.approx(skm.log_loss(y, proba, labels=[0, 1, 2]),
                                                   rel=1e-12)
        assert result["macro_f1"] == pytest.approx(
            skm.f1_score(y, predicted, average="macro"), rel=1e-12)


def test_macro_f1_averages_over_classes_present_as_scikit_learn_does() -> None:
    # Reference library: scikit-learn f1_score(average="macro") uses the labels
    # found in y_true or y_pred; class 3 of 4 never occurs here.
    y = np.array([0, 0, 1, 2, 2, 2, 1, 0])
    proba = np.eye(4)[[0, 1, 1, 2, 0, 2, 1, 0]] * 0.7 + 0.075
    expected = skm.f1_score(y, proba.argmax(axis=1), average="macro")
    assert batch_metrics("multiclass", y, proba)["macro_f1"] == pytest.approx(expected)
    assert stream("multiclass", y, proba)["macro_f1"] == pytest.approx(expected)


def test_regression_metrics_equal_scikit_learn_on_diabetes_predictions() -> None:
    # Data: Diabetes (Efron et al. 2004), shipped with scikit-learn. Reference: scikit-learn.
    y, predicted = held_out_scores(load_diabetes, LinearRegression())
    for result in (batch_metrics("regression", y, predicted),
                   stream("regression", y, predicted)):
        assert result["rmse"] == pytest.approx(
            np.sqrt(skm.mean_squared_error(y, predicted[:, 0])), rel=1e-12)
        assert result["mae"] == pytest.approx(skm.mean_absolute_error(y, predicted[:, 0]),
                                              rel=1e-12)
        assert result["r2"] == pytest.approx(skm.r2_score(y, predicted[:, 0]), rel=1e-10)


def test_r2_of_a_constant_target_follows_scikit_learn() -> None:
    # Reference library: scikit-learn r2_score (force_finite): 1.0 if perfect, else 0.0.
    y = np.full(4, 3.0)
    for predicted in (np.full((4, 1), 3.0), np.array([[3.0], [2.0], [3.0], [4.0]])):
        expected = skm.r2_score(y, predicted[:, 0])
        assert batch_metrics("regression", y, predicted)["r2"] == expected
        assert stream("regression", y, predicted)["r2"] == expected


@pytest.mark.parametrize("seed", range(5))
def test_roc_auc_is_the_mann_whitney_statistic_with_ties(seed: int) -> None:
    # Hanley & McNeil, Radiology 143 (1982): AUC = U / (n_pos * n_neg), ties counting
    # one half. References: scipy.stats.mannwhitneyu and scikit-learn roc_auc_score.
    rng = np.random.default_rng(seed)
    y = rng.integers(0, 2, 300)
    scores = np.round(rng.uniform(size=300) * 0.6 + 0.3 * y, 1)  # many ties
    u = mannwhitneyu(scores[y == 1], scores[y == 0]).statistic
    auc = roc_auc(y, scores)
    assert auc == pytest.approx(u / ((y == 1).sum() * (y == 0).sum()), rel=1e-12)
    assert auc == pytest.approx(skm.roc_auc_score(y, scores), rel=1e-12)
