"""Numbers as a person reads them on the pages: edges rounded to a few
significant digits (more only where two neighbours would read the same), and
a numeric field's drift bins as ranges with open ends said in words.

The exact values stay in the API's answers and in the pages' data-* attributes.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

SIGNIFICANT = 4
MOST_SIGNIFICANT = 15


def rounded(value: float, digits: int = SIGNIFICANT) -> str:
    """``value`` to ``digits`` significant digits, without float noise
    (2.1320000000000006 -> "2.132", 50000.0 -> "50,000")."""
    short = float(f"{value:.{digits}g}")
    if short.is_integer() and abs(short) < 1e15:
        return f"{int(short):,}"
    return f"{short:,.{digits}g}"


def edge_texts(edges: Sequence[float]) -> list[str]:
    """Each edge rounded, with as many digits as it takes for neighbours that
    differ to read differently too."""
    digits = SIGNIFICANT
    while True:
        texts = [rounded(edge, digits) for edge in edges]
        clash = any(a == b and x != y for a, b, x, y in
                    zip(texts, texts[1:], edges, edges[1:], strict=False))
        if not clash or digits >= MOST_SIGNIFICANT:
            return texts
        digits += 1


def numeric_bins(labels: Sequence[str]) -> list[dict[str, Any]]:
    """A numeric field's PSI bins as the drift answer names them (each its
    lower edge, the first "-inf") as ranges: below the first edge, from one
    edge up to the next (a value on an edge counts in the bin above it), and
    the last edge and above."""
    edges = [float(label) for label in labels[1:]]
    texts = edge_texts(edges)
    bins: list[dict[str, Any]] = []
    for i in range(len(labels)):
        lower = None if i == 0 else edges[i - 1]
        upper = edges[i] if i < len(edges) else None
        if lower is None and upper is None:
            text = short = "every value"
        elif lower is None:
            text, short = f"below {texts[0]}", f"< {texts[0]}"
        elif upper is None:
            text, short = f"{texts[i - 1]} and above", f"≥ {texts[i - 1]}"
        else:
            text = f"{texts[i - 1]} to {texts[i]}"
            short = f"{texts[i - 1]}–{texts[i]}"
        # ``short``: the chart's tick labels, where the words would not fit.
        bins.append({"label": text, "short": short, "lower": lower, "upper": upper})
    return bins
