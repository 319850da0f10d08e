"""Open datasets shipped with scikit-learn: Keelson's batch fit on a holdout split
reaches the floors of docs/references.md and lands within a few points of scikit-learn's MLP
(reference library) on the same split."""

from __future__ import annotations

import warnings

import numpy as np
from sklearn.datasets import load_breast_cancer, load_diabetes, load_iris
from sklearn.exceptions import ConvergenceWarning
from sklearn.linear_model import LinearRegression
from sklearn.metrics import r2_score
from sklearn.model_selection import train_test_split
from sklearn.neural_network import MLPClassifier, MLPRegressor
from sklearn.preprocessing import StandardScaler

from engine import Learner


def as_rows(X: np.ndarray, names: list[str]) -> list[dict[str, float]]:
    return [dict(zip(names, map(float, row), strict=True)) for row in X]


def keelson_fit(task, X_train, X_test, y_train, y_test, classes=None, **settings):
    names = [f"f{i}" for i in range(X_train.shape[1])]
    spec = {"task": task, "features": [{"name": n, "type": "numeric"} for n in names],
            "training": {"learning_rate": 0.01, **settings}}
    if classes is not None:
        spec["classes"] = classes
    train_rows = as_rows(X_train, names)
    learner = Learner.create(spec, warmup=train_rows, warmup_labels=y_train.tolist())
    learner.fit(learner.encode(train_rows), learner.encode_labels(y_train.tolist()))
    return learner.evaluate(learner.encode(as_rows(X_test, names)),
                            learner.encode_labels(y_test.tolist()))


def sklearn_score(model, X_train, X_test, y_train, y_test):
    scaler = StandardScaler().fit(X_train)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        model.fit(scaler.transform(X_train), y_train)
    return model.score(scaler.transform(X_test), y_test)


def test_breast_cancer_holdout_accuracy():
    """Street, Wolberg & Mangasarian (1993), UCI copy shipped with scikit-learn."""
    X, y = load_breast_cancer(return_X_y=True)
    assert X.shape == (569, 30) and np.bincount(y).tolist() == [212, 357]
    split = train_test_split(X, y, test_size=0.25, random_state=0, stratify=y)
    ours = keelson_fit("binary", *split, classes=[0, 1])["accuracy"]
    reference = sklearn_score(MLPClassifier(random_state=0, max_iter=300), *split)
    assert ours >= 0.95  # floor: common practice (docs/references.md)
    assert ours >= reference - 0.03


def test_iris_holdout_accuracy():
    """Fisher, Annals of Eugenics 7 (1936)."""
    X, y = load_iris(return_X_y=True)
    assert X.shape == (150, 4) and np.bincount(y).tolist() == [50, 50, 50]
    split = train_test_split(X, y, test_size=0.3, random_state=0, stratify=y)
    ours = keelson_fit("multiclass", *split, classes=[0, 1, 2], learning_rate=0.05,
                       batch_size=16)["accuracy"]
    reference = sklearn_score(MLPClassifier(random_state=0, max_iter=1000), *split)
    assert ours >= 0.9
    assert ours >= reference - 0.05


def test_diabetes_holdout_r2_near_least_squares():
    """Efron, Hastie, Johnstone & Tibshirani, Annals of Statistics (2004)."""
    X, y = load_diabetes(return_X_y=True)
    assert X.shape == (442, 10)
    split = train_test_split(X, y, test_size=0.25, random_state=0)
    X_train, X_test, y_train, y_test = split
    ours = keelson_fit("regression", *split)["r2"]  # the spec defaults
    ols = r2_score(y_test, LinearRegression().fit(X_train, y_train).predict(X_test))
    reference = sklearn_score(MLPRegressor(random_state=0, max_iter=2000, alpha=1.0), *split)
    assert ours >= ols - 0.1
    assert ours >= reference - 0.05
