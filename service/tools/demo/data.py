"""Invented data for the demo: weekly summaries of the pumps of a small water utility.

Nothing here is measured; the numbers only have to look plausible and carry a
pattern worth learning. Each record is one pump-week:

| field | unit | drawn as |
|---|---|---|
| `vibration_rms` | mm/s | exp(ln 3.5 + 0.45 wear + 0.35 e1), wear and e1 standard normal |
| `bearing_temp_c` | °C | 58 + 7 wear + 8 e2 |
| `motor_current_dev_pct` | % from nameplate | normal, sd 4 |
| `hours_since_service` | h | uniform 0 to 9,000 |
| `starts_per_day` | 1/day | Poisson, mean 6 (mean 12 for a fifth of the pumps) |
| `pump_family` | | centrifugal 50 %, screw 20 %, submersible 30 % (fixed per pump) |
| `has_vfd` | | variable-speed drive fitted, 40 % of pumps (fixed per pump) |

A shared latent ``wear`` makes vibration and temperature rise together, as a
worn bearing would. The label ``failed_within_30d`` ("failed" or "ok") is drawn
from a logistic rule (``failure_probability``)::

    hot_and_shaking = s((vibration_rms - 7) / 0.8) * s((bearing_temp_c - 70) / 3)
    logit = -3.4 + 5.0 hot_and_shaking
            + 0.9 hours_since_service / 8000
            + 0.06 |motor_current_dev_pct|
            + 0.08 max(starts_per_day - 8, 0) * (0.4 if has_vfd else 1)
            + {centrifugal: 0, screw: -0.3, submersible: 0.4}[pump_family]

with s the logistic function. The first term is an interaction: high
vibration alone or high temperature alone adds little, both together add a
lot, so a network needs its hidden units to see it. Drawing the label from the
probability (a Bernoulli draw) is the noise.
"""

from __future__ import annotations

import math
from collections.abc import Iterator
from typing import Any

import numpy as np

MODEL_NAME = "pump-risk"
FAMILIES = ("centrifugal", "screw", "submersible")
FAMILY_SHARES = (0.5, 0.2, 0.3)
FAMILY_OFFSET = {"centrifugal": 0.0, "screw": -0.3, "submersible": 0.4}
PUMPS_PER_STATION = 4
STATIONS = 12


def model_spec() -> dict[str, Any]:
    """The demo model, as a client would POST it to /v1/models."""
    return {
        "name": MODEL_NAME,
        "task": "binary",
        "target": "failed_within_30d",
        "classes": ["ok", "failed"],
        "features": [
            {"name": "vibration_rms", "type": "numeric", "min": 0, "max": 50, "unit": "mm/s"},
            {"name": "bearing_temp_c", "type": "numeric", "min": -20, "max": 150, "unit": "°C"},
            {"name": "motor_current_dev_pct", "type": "numeric", "min": -60, "max": 60,
             "unit": "%"},
            {"name": "hours_since_service", "type": "numeric", "min": 0, "max": 50000,
             "unit": "h"},
            {"name": "starts_per_day", "type": "numeric", "min": 0, "max": 500, "unit": "1/day"},
            {"name": "pump_family", "type": "categorical", "levels": list(FAMILIES)},
            {"name": "has_vfd", "type": "boolean"},
        ],
        "hidden_layers": [16, 8],
        "activation": "tanh",
        "training": {"optimizer": "adam", "learning_rate": 0.01, "l2": 0.0001,
                     "batch_size": 64, "max_epochs": 150, "seed": 0,
                     "holdout_fraction": 0.2, "checkpoint_every": 500,
                     "warmup_records": 256},
        "promotion": "auto",
    }


def _logistic(z: float) -> float:
    return 1.0 / (1.0 + math.exp(-z))


def failure_probability(features: dict[str, Any]) -> float:
    """The invented rule's probability that the pump fails within 30 days."""
    hot_and_shaking = (_logistic((features["vibration_rms"] - 7.0) / 0.8)
                       * _logistic((features["bearing_temp_c"] - 70.0) / 3.0))
    starts_excess = max(features["starts_per_day"] - 8.0, 0.0)
    logit = (-3.4 + 5.0 * hot_and_shaking
             + 0.9 * features["hours_since_service"] / 8000.0
             + 0.06 * abs(features["motor_current_dev_pct"])
             + 0.08 * starts_excess * (0.4 if features["has_vfd"] else 1.0)
             + FAMILY_OFFSET[features["pump_family"]])
    return _logistic(logit)


def generate_records(count: int, seed: int = 7, *, first_week: int = 0,
                     heat_wave_stations: frozenset[int] = frozenset(),
                     heat_wave_c: float = 0.0) -> Iterator[dict[str, Any]]:
    """``count`` labelled pump-weeks, in week order, as API records with keys.

    The same arguments always give the same records, so sending them twice
    stores nothing new (the keys repeat). The seed draws the fleet (each
    pump's family, drive and duty) and then its weeks; ``first_week`` starts
    the weeks later, the same fleet with weeks of their own (the second act
    scores pump-weeks after the training ones), and the stations in
    ``heat_wave_stations`` (numbered from 1) run ``heat_wave_c`` hotter bearings
    through the weather alone: the failure rule still sees the temperature.
    """
    rng = np.random.default_rng(seed)
    pumps = STATIONS * PUMPS_PER_STATION
    family = rng.choice(len(FAMILIES), size=pumps, p=FAMILY_SHARES)
    has_vfd = rng.random(pumps) < 0.4
    busy = rng.random(pumps) < 0.2
    if first_week:
        rng = np.random.default_rng([seed, first_week])
    for index in range(count):
        pump, week = index % pumps, first_week + index // pumps
        station = pump // PUMPS_PER_STATION + 1
        wear, e1, e2 = rng.standard_normal(3)
        hotter = heat_wave_c if station in heat_wave_stations else 0.0
        features = {
            "vibration_rms": round(float(np.clip(math.exp(math.log(3.5) + 0.45 * wear
                                                          + 0.35 * e1), 0.2, 45.0)), 2),
            "bearing_temp_c": round(float(np.clip(58.0 + hotter + 7.0 * wear + 8.0 * e2,
                                                   5.0, 120.0)), 1),
            "motor_current_dev_pct": round(float(np.clip(rng.normal(0.0, 4.0), -40, 40)), 1),
            "hours_since_service": round(float(rng.uniform(0.0, 9000.0))),
            "starts_per_day": int(rng.poisson(12.0 if busy[pump] else 6.0)),
            "pump_family": FAMILIES[int(family[pump])],
            "has_vfd": bool(has_vfd[pump]),
        }
        failed = rng.random() < failure_probability(features)
        yield {
            "key": f"st{station:02d}-p{pump % PUMPS_PER_STATION + 1}-w{week + 1:03d}",
            "features": features,
            "label": "failed" if failed else "ok",
        }


# Pumps to show predictions for: each isolates part of the rule.
SHOWCASE: list[tuple[str, dict[str, Any]]] = [
    ("hot and shaking screw pump", {
        "vibration_rms": 9.5, "bearing_temp_c": 82.0, "motor_current_dev_pct": 3.0,
        "hours_since_service": 4000, "starts_per_day": 6, "pump_family": "screw",
        "has_vfd": False}),
    ("shaking but cool centrifugal pump", {
        "vibration_rms": 9.5, "bearing_temp_c": 52.0, "motor_current_dev_pct": 3.0,
        "hours_since_service": 4000, "starts_per_day": 6, "pump_family": "centrifugal",
        "has_vfd": False}),
    ("long unserviced submersible, many starts", {
        "vibration_rms": 3.2, "bearing_temp_c": 57.0, "motor_current_dev_pct": -9.0,
        "hours_since_service": 8800, "starts_per_day": 20, "pump_family": "submersible",
        "has_vfd": False}),
    ("recently serviced pump with a drive", {
        "vibration_rms": 2.4, "bearing_temp_c": 49.0, "motor_current_dev_pct": 0.5,
        "hours_since_service": 300, "starts_per_day": 4, "pump_family": "centrifugal",
        "has_vfd": True}),
]
