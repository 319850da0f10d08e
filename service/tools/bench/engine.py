"""`keelson bench engine`: the engine's throughput and latency beside PyTorch and
scikit-learn on the same shapes, single-threaded, medians of several repetitions.

The inputs are random numbers from a fixed seed (throughput does not depend on
what the numbers mean). Keelson's online figure is `Learner.learn` on encoded
rows: scoring, prequential metrics and one SGD step (momentum 0.9, L2, clipping:
the spec defaults) per record.
"""

from __future__ import annotations

import contextlib
import statistics
import time
from collections.abc import Callable
from typing import Any

import numpy as np

from engine import Learner, heads
from engine.network import Network

REPEATS = 5
ONLINE_NETS = [(20, 32, 16, 1), (64, 128, 64, 1)]
BATCH_NET, BATCH_SIZE, BATCH_EPOCHS, BATCH_ROWS = (20, 32, 16, 1), 256, 5, 8192


def _median_rate(run: Callable[[], int]) -> float:
    """Median over REPEATS of items per second; run() does the work, returns the count."""
    rates = []
    for _ in range(REPEATS):
        start = time.perf_counter()
        count = run()
        rates.append(count / (time.perf_counter() - start))
    return round(statistics.median(rates), 1)


def _median_us(run: Callable[[], Any], inner: int) -> float:
    """Median over REPEATS of microseconds per call of run()."""
    times = []
    for _ in range(REPEATS):
        start = time.perf_counter()
        for _ in range(inner):
            run()
        times.append((time.perf_counter() - start) / inner * 1e6)
    return round(statistics.median(times), 2)


def _problem(n_inputs: int, rows: int, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(rows, n_inputs))
    y = (X[:, 0] - 0.5 * X[:, 1] + 0.3 * rng.normal(size=rows) > 0).astype(np.int64)
    return X, y


def _learner(net: tuple[int, ...], **training: Any) -> Learner:
    spec = {"task": "binary",
            "features": [{"name": f"x{i}", "type": "numeric"} for i in range(net[0])],
            "hidden_layers": list(net[1:-1]), "training": training}
    return Learner.create(spec)


def _keelson_online(net: tuple[int, ...], rows: int) -> float:
    X, y = _problem(net[0], rows)
    learner = _learner(net)
    learner.learn(X[:200], y[:200])  # warm caches and code paths

    def run() -> int:
        learner.learn(X, y)
        return rows
    return _median_rate(run)


def _torch_online(net: tuple[int, ...], rows: int) -> float:
    import torch

    X, y = _problem(net[0], rows)
    tX, ty = torch.tensor(X), torch.tensor(y, dtype=torch.float64)
    model = _torch_model(net, torch.float64)
    opt = torch.optim.SGD(model.parameters(), lr=0.01, momentum=0.9, weight_decay=1e-4)
    loss_fn = torch.nn.BCEWithLogitsLoss()

    def run() -> int:
        for i in range(rows):
            opt.zero_grad()
            loss = loss_fn(model(tX[i : i + 1])[:, 0], ty[i : i + 1])
            loss.backward()
            torch.nn.utils.clip_grad_norm_(model.parameters(), 5.0)
            opt.step()
        return rows
    return _median_rate(run)


def _torch_model(net: tuple[int, ...], dtype: Any) -> Any:
    import torch

    layers: list[Any] = []
    for i, (a, b) in enumerate(zip(net[:-1], net[1:], strict=True)):
        layers.append(torch.nn.Linear(a, b, dtype=dtype))
        if i < len(net) - 2:
            layers.append(torch.nn.Tanh())
    return torch.nn.Sequential(*layers)


def _sklearn_online(net: tuple[int, ...], rows: int) -> float:
    import warnings

    from sklearn.neural_network import MLPClassifier

    X, y = _problem(net[0], rows)
    model = MLPClassifier(hidden_layer_sizes=net[1:-1], activation="tanh", solver="sgd",
                          learning_rate_init=0.01, momentum=0.9, alpha=1e-4, batch_size=1)
    model.partial_fit(X[:1], y[:1], classes=np.array([0, 1]))

    def run() -> int:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            for i in range(rows):
                model.partial_fit(X[i : i + 1], y[i : i + 1])
        return rows
    return _median_rate(run)


def _keelson_batch() -> float:
    X, y = _problem(BATCH_NET[0], BATCH_ROWS)
    learner = _learner(BATCH_NET, batch_size=BATCH_SIZE, max_epochs=BATCH_EPOCHS,
                       patience=BATCH_EPOCHS + 1, validation_fraction=0.0)

    def run() -> int:
        learner.fit(X, y)
        return BATCH_ROWS * BATCH_EPOCHS
    return _median_rate(run)


def _torch_batch() -> float:
    import torch

    X, y = _problem(BATCH_NET[0], BATCH_ROWS)
    tX = torch.tensor(X, dtype=torch.float32)
    ty = torch.tensor(y, dtype=torch.float32)
    model = _torch_model(BATCH_NET, torch.float32)
    opt = torch.optim.SGD(model.parameters(), lr=0.01, momentum=0.9, weight_decay=1e-4)
    loss_fn = torch.nn.BCEWithLogitsLoss()
    generator = torch.Generator().manual_seed(0)

    def run() -> int:
        for _ in range(BATCH_EPOCHS):
            order = torch.randperm(BATCH_ROWS, generator=generator)
            for start in range(0, BATCH_ROWS, BATCH_SIZE):
                rows = order[start : start + BATCH_SIZE]
                opt.zero_grad()
                loss = loss_fn(model(tX[rows])[:, 0], ty[rows])
                loss.backward()
                torch.nn.utils.clip_grad_norm_(model.parameters(), 5.0)
                opt.step()
        return BATCH_ROWS * BATCH_EPOCHS
    return _median_rate(run)


def _latencies() -> dict[str, float]:
    X, y = _problem(20, 2000)
    learner = _learner((20, 32, 16, 1))
    learner.learn(X, y)
    x = X[0]
    row = X[:1]
    label = learner.classes[1]  # the service names the explained class, as here
    return {
        "predict": _median_us(lambda: learner.predict(row), 2000),
        "gradient": _median_us(
            lambda: learner.explain(x, method="gradient", output=label), 2000),
        "integrated_gradients_64": _median_us(
            lambda: learner.explain(x, method="integrated_gradients", output=label, steps=64),
            1000),
        "shapley_7_fields": _shapley_latency(),
    }


def _shapley_latency() -> float:
    """Exact Shapley values (2^7 coalitions) of one record on 20-32-16-1 whose 20
    inputs are 7 fields: 5 numbers and two categorical fields of 8 and 7 levels."""
    levels = {"c5": [f"a{i}" for i in range(8)], "c6": [f"b{i}" for i in range(7)]}
    spec = {"task": "binary", "hidden_layers": [32, 16],
            "features": [{"name": f"x{i}", "type": "numeric"} for i in range(5)]
            + [{"name": name, "type": "categorical", "levels": values}
               for name, values in levels.items()]}
    X, y = _problem(5, 2000)
    rng = np.random.default_rng(1)
    rows = [{**{f"x{i}": float(v) for i, v in enumerate(x)},
             **{name: values[int(rng.integers(len(values)))] for name, values in levels.items()}}
            for x in X]
    learner = Learner.create(spec, warmup=rows[:200], warmup_labels=y[:200].tolist())
    encoded = learner.encode(rows)
    learner.learn(encoded, y)
    x, label = encoded[0], learner.classes[1]
    return _median_us(lambda: learner.explain(x, method="shapley", output=label), 1000)


def _gradient_cost() -> dict[str, float]:
    """Full gradient of one record's loss: one forward pass per weight perturbed
    (forward differences) against one backpropagation pass."""
    net = Network.create((20, 32, 16, 1), "tanh", "logistic", np.random.default_rng(0))
    X, y = _problem(20, 1)

    def loss() -> float:  # a forward pass only
        return float(heads.losses("logistic", "cross_entropy", net.logits(X), y).mean())

    def perturbation() -> None:
        base = loss()
        eps = 1e-6
        for j in range(net.params.size):
            saved = net.params[j]
            net.params[j] = saved + eps
            _ = (loss() - base) / eps
            net.params[j] = saved

    backprop_us = _median_us(lambda: net.loss_gradient(X, y, "cross_entropy"), 2000)
    perturbation_us = _median_us(perturbation, 3)
    return {"weights": int(net.params.size),
            "perturbation_over_backprop": round(perturbation_us / backprop_us, 1)}


def run_engine_bench() -> dict[str, Any]:
    """Measure everything (single-threaded BLAS) and return one JSON object (the
    README's engine figures).

    A reference library that is not installed gives null and a line in `notes`.
    """
    notes: list[str] = []
    have_torch = _importable("torch", notes)
    have_sklearn = _importable("sklearn", notes)
    if have_torch:
        import torch

        torch.set_num_threads(1)
    with _one_blas_thread(notes):
        online = []
        for net in ONLINE_NETS:
            rows = 20000 if net[1] <= 32 else 5000
            online.append({
                "net": list(net),
                "keelson": _keelson_online(net, rows),
                "torch": _torch_online(net, 1000) if have_torch else None,
                "sklearn": _sklearn_online(net, 300) if have_sklearn else None,
            })
        batch = [{"net": list(BATCH_NET), "batch_size": BATCH_SIZE,
                  "keelson": _keelson_batch(),
                  "torch": _torch_batch() if have_torch else None}]
        result: dict[str, Any] = {
            "online": online,
            "batch": batch,
            "latency_us": _latencies(),
            "gradient_cost": _gradient_cost(),
        }
    if notes:
        result["notes"] = notes
    return result


def _one_blas_thread(notes: list[str]) -> contextlib.AbstractContextManager[Any]:
    """Pin BLAS to one thread (threadpoolctl comes with scikit-learn)."""
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:
        notes.append("threadpoolctl is not installed: BLAS threads were not pinned")
        return contextlib.nullcontext()
    pinned: contextlib.AbstractContextManager[Any] = threadpool_limits(limits=1)
    return pinned


def _importable(name: str, notes: list[str]) -> bool:
    try:
        __import__(name)
    except ImportError:
        notes.append(f"{name} is not installed (pip install keelson[test]): its figures are "
                     "null")
        return False
    return True
