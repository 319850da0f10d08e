"""Terminal rendering for the demo: version tables, explanation bars, cautions."""

from __future__ import annotations

import sys
from collections.abc import Mapping, Sequence
from typing import Any

BAR_WIDTH = 16

CAUTIONS = """Cautions
  - Scores are decision support, not decisions.
  - Where a decision can hurt someone or damage equipment, a person reviews it.
  - Validate any model on your own local data first; this demo's data is invented.
  - Local codes, regulations and licensed professional practice prevail over any score."""

UNITS = {"vibration_rms": "mm/s", "bearing_temp_c": "°C", "motor_current_dev_pct": "%",
         "hours_since_service": "h", "starts_per_day": "/day"}


def _block_chars() -> tuple[str, str]:
    """Full and half blocks where the terminal takes UTF-8, else ASCII."""
    encoding = (getattr(sys.stdout, "encoding", None) or "").lower().replace("-", "")
    return ("█", "▌") if encoding == "utf8" else ("#", "+")


def bar(value: float, scale: float, width: int = BAR_WIDTH) -> str:
    """A bar of ``|value| / scale`` of ``width`` cells, in half-cell steps."""
    full, half = _block_chars()
    if scale <= 0:
        return ""
    halves = round(min(abs(value) / scale, 1.0) * width * 2)
    return full * (halves // 2) + half * (halves % 2)


def diverging_bar(value: float, scale: float, width: int = BAR_WIDTH) -> str:
    """Negative values grow left of the axis, positive ones right of it."""
    drawn = bar(value, scale, width)
    left = drawn.rjust(width) if value < 0 else " " * width
    right = drawn.ljust(width) if value > 0 else " " * width
    return f"{left}|{right}"


def _shown(field: str, value: Any) -> str:
    if isinstance(value, bool):
        return "yes" if value else "no"
    unit = UNITS.get(field)
    return f"{value:g} {unit}" if unit and isinstance(value, int | float) else str(value)


def render_prediction(title: str, features: Mapping[str, Any], body: Mapping[str, Any],
                      scale: float, rule_probability: float | None = None) -> str:
    result, explanation = body["result"], body["explanation"]
    probability = result["probabilities"].get("failed")
    head = f"{title}: P(failed within 30 days) = {probability:.2f} (version {body['version']}"
    if rule_probability is not None:
        head += f"; the invented rule that made the data says {rule_probability:.2f}"
    lines = [head + ")"]
    for field, attribution in explanation["attributions"].items():
        lines.append(f"  {field:<22} {_shown(field, features.get(field)):>12}  "
                     f"{attribution:+.3f} {diverging_bar(attribution, scale)}")
    gap = explanation.get("completeness_gap")
    if gap is not None:
        lines.append(f"  (attributions sum to P(x) - P(baseline) within {gap:.1e})")
    return "\n".join(lines)


_SHOWN_METRICS = {"accuracy": "accuracy", "roc_auc": "ROC AUC", "log_loss": "log loss"}


def _metric_summary(metrics: Mapping[str, Any]) -> str:
    """The holdout metrics when the version has them, else whatever is at the top."""
    holdout = metrics.get("holdout")
    chosen: Mapping[str, Any] = holdout if isinstance(holdout, Mapping) else metrics
    shown = [f"{label} {chosen[key]:.3f}" for key, label in _SHOWN_METRICS.items()
             if isinstance(chosen.get(key), int | float)]
    return ", ".join(shown) or "-"


def render_versions(versions: Sequence[Mapping[str, Any]]) -> str:
    lines = ["Versions (every one kept; promotion moves a pointer):",
             f"  {'no.':>4} {'origin':<8} {'status':<10} {'records':>8}  holdout metrics"]
    for version in versions:
        lines.append(f"  {version['number']:>4} {version['origin']:<8} {version['status']:<10} "
                     f"{version['records_seen']:>8}  {_metric_summary(version['metrics'])}")
    return "\n".join(lines)
