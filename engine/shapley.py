"""Shapley values of the fields of one prediction (Shapley 1953).

The game: v(S) = f(x with the fields in S, the baseline elsewhere), f one head
output. A field is one player: a categorical field's one-hot columns move
together, from the baseline's shares to x's levels. The value of field i is

    phi_i = sum over S not holding i of |S|! (d - |S| - 1)! / d! (v(S + i) - v(S)),

so the values add up to v(all) - v(none) = f(x) - f(baseline) (efficiency).

- Exact (`exact`): every one of the 2^d coalitions goes forward, in batches of
  at most BATCH_ROWS examples through engine.kernel's one forward pass, and
  each field's value is the weighted sum above over its 2^(d-1) pairs (S, S + i),
  whose indices and weights are cached per d.
- Sampled (`sampled`): permutation sampling (Strumbelj & Kononenko 2014). Each
  of `samples` random orders of the fields adds them one by one from the
  baseline to x; a field's estimate is the mean of its marginal contributions,
  its standard error their standard deviation over sqrt(samples). Each order's
  contributions telescope to f(x) - f(baseline), so efficiency holds here too.

A point takes x's value exactly where its coalition holds a field (np.copyto with
a mask, not baseline + 1.0 * (x - baseline), which may round off x).

Values are in head units (a probability or a standardised value); the caller
(engine.attribution) turns them into the output's units like the other methods.
"""

from __future__ import annotations

import functools
import math

import numpy as np
from numpy.typing import NDArray

from .activations import HEADS
from .encoding import Encoder
from .errors import InvalidInputError
from .kernel import forward
from .network import Network

# At most this many examples go forward at once (2^12 coalitions: one pass).
BATCH_ROWS = 4096
# The largest exact game: 2^16 coalitions (pair indices and weights of some 12 MB).
MAX_EXACT_FIELDS = 16

Array = NDArray[np.float64]
# (head unit explained, f(x), f(baseline), values per field, standard errors or None)
Shapley = tuple[int, float, float, Array, Array | None]


@functools.lru_cache(maxsize=MAX_EXACT_FIELDS + 1)
def _coalitions(d: int) -> tuple[NDArray[np.bool_], NDArray[np.intp], NDArray[np.intp], Array]:
    """Membership (2^d, d) of every coalition (coalition k holds field i when bit i
    of k is set: 0 is the baseline, 2^d - 1 is x); for each field i, the coalitions
    S without it and S + i (d, 2^(d-1)), and the weights |S|! (d - |S| - 1)! / d!
    of the pairs (d, 2^(d-1)). Read-only, cached."""
    everyone = np.arange(1 << d)
    members = ((everyone[:, None] >> np.arange(d)) & 1).astype(bool)
    without = np.array([everyone[~members[:, i]] for i in range(d)]).reshape(d, -1)
    with_i = without | (1 << np.arange(d))[:, None]
    weight = np.array([math.factorial(s) * math.factorial(d - s - 1) / math.factorial(d)
                       for s in range(d)])
    pair_weights = weight[members.sum(axis=1)[without]]
    for array in (members, without, with_i, pair_weights):
        array.flags.writeable = False
    return members, without, with_i, pair_weights


def _values(network: Network, encoder: Encoder, x: Array, baseline: Array,
            holds: NDArray[np.bool_], unit: int | None) -> tuple[int, Array]:
    """f at the points whose fields are x's where `holds` (rows, d) is true and the
    baseline's elsewhere, for head unit `unit` (None: the most probable at the
    last point, which the callers make x itself)."""
    rows = holds.shape[0]
    work = network.workspace(rows, 1)
    try:
        points = work.examples
        np.copyto(points, baseline[:, None])
        np.copyto(points, x[:, None], where=holds.T[encoder.column_field])
        p = HEADS[network.output].activate_(forward(work, work.inputs).T)
        if unit is None:
            unit = int(p[-1].argmax()) if p.shape[1] > 1 else 0
        return unit, p[:, unit].copy()
    finally:
        network.release(work)


def exact(network: Network, encoder: Encoder, x: Array, baseline: Array,
          unit: int | None) -> Shapley:
    """Exact Shapley values over all 2^d coalitions (see the module docstring)."""
    d = len(encoder.fields)
    if d > MAX_EXACT_FIELDS:
        raise InvalidInputError(f"exact Shapley values take at most {MAX_EXACT_FIELDS} "
                                f"fields, not {d}", field="explain")
    members, without, with_i, pair_weights = _coalitions(d)
    total = members.shape[0]
    v = np.empty(total)
    # Last batch first: it ends with x, where an unnamed unit is chosen.
    for stop in range(total, 0, -BATCH_ROWS):
        start = max(0, stop - BATCH_ROWS)
        unit, v[start:stop] = _values(network, encoder, x, baseline, members[start:stop], unit)
    assert unit is not None
    # Pairwise differences, not one weighted sum of v: a field that changes no
    # output (every v(S + i) = v(S)) then gets exactly 0, not rounding noise.
    differences = v[with_i]
    differences -= v[without]
    differences *= pair_weights
    return unit, float(v[-1]), float(v[0]), differences.sum(axis=1), None


def sampled(network: Network, encoder: Encoder, x: Array, baseline: Array,
            unit: int | None, samples: int, seed: int) -> Shapley:
    """Permutation-sampling estimates and their standard errors (see the module
    docstring); `samples` >= 2 orders drawn from `seed`."""
    if isinstance(samples, bool) or not isinstance(samples, int) or samples < 2:
        raise InvalidInputError("sampled Shapley values need samples >= 2 (one order "
                                "gives no standard error)", field="samples")
    d = len(encoder.fields)
    rng = np.random.default_rng(seed)
    orders = np.argsort(rng.random((samples, d)), axis=1)  # uniform random permutations
    ranks = np.argsort(orders, axis=1)  # ranks[s, i]: where field i comes in order s
    steps = np.arange(1, d + 1)
    contributions = np.empty((samples, d))
    per_batch = max(1, (BATCH_ROWS - 1) // d)
    value = baseline_value = 0.0
    for start in range(0, samples, per_batch):
        chunk = ranks[start : start + per_batch]
        # Row 0: the baseline; then per order, its first k fields for k = 1..d.
        holds = np.zeros((1 + chunk.shape[0] * d, d), dtype=bool)
        holds[1:] = (chunk[:, None, :] < steps[None, :, None]).reshape(-1, d)
        unit, v = _values(network, encoder, x, baseline, holds, unit)
        baseline_value, value = float(v[0]), float(v[-1])
        walks = v[1:].reshape(-1, d)
        marginal = np.diff(walks, axis=1, prepend=v[0])  # by position in the order
        contributions[start : start + chunk.shape[0]] = np.take_along_axis(marginal, chunk,
                                                                           axis=1)
    assert unit is not None
    phi = contributions.mean(axis=0)
    errors = contributions.std(axis=0, ddof=1) / math.sqrt(samples)
    return unit, value, baseline_value, phi, errors
