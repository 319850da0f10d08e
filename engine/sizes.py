"""How big a spec's network and its snapshots are, from the spec alone.

Pure arithmetic on a spec (as `apply_defaults` returns it): nothing is built,
so a caller can refuse a network before allocating it. The service's size
limits (parameters, the bytes a version writes per record) read these and no
other count.

- `layer_sizes`: inputs (a numeric or boolean feature is one input, a
  categorical one an input per level, as engine.encoding lays them out), the
  hidden layers, outputs (one per class of a multiclass task, else one).
- `parameter_count`: weights and biases of those layers (engine.network).
- `snapshot_bytes`: an upper bound of `Learner.to_bytes()`'s length: every
  array a snapshot stores, uncompressed, plus its JSON metadata and the
  archive's own headers. Weights are noise to a compressor, so for a large
  network the bound is within a tenth of the real size
  (tests/engine/test_sizes.py holds both sides).
"""

from __future__ import annotations

import json
import math
from collections.abc import Mapping
from typing import Any

from engine.metrics import AUC_BINS
from engine.network import Network
from engine.optimizers import SGD, Adam

FLOAT_BYTES = 8
_STATE_VECTORS = {"sgd": SGD.state_vectors, "adam": Adam.state_vectors}
# Per stored array: a zip entry (local header, central directory record, data
# descriptor) and the .npy header, together well under this.
_ARRAY_OVERHEAD = 512
# The snapshot's metadata besides the spec: sizes, counters, encoder and
# prequential descriptions, the caller's `extra` (a cursor, an encoder key).
_META_OVERHEAD = 4096
# Arrays of a snapshot that are not parameter-sized: input_sum, the encoder's
# center, scale and target, the prequential count and sums, its confusion
# matrix and (binary) histogram, the metadata, and the optimizer's vectors.
_FIXED_ARRAYS = 8


def input_width(spec: Mapping[str, Any]) -> int:
    """Encoded inputs: one per numeric or boolean feature, one per level of a
    categorical one."""
    return sum(len(f.get("levels") or ()) if f.get("type") == "categorical" else 1
               for f in spec["features"])


def output_width(spec: Mapping[str, Any]) -> int:
    return len(spec["classes"]) if spec["task"] == "multiclass" else 1


def layer_sizes(spec: Mapping[str, Any]) -> tuple[int, ...]:
    return (input_width(spec), *(int(h) for h in spec["hidden_layers"]), output_width(spec))


def parameter_count(spec: Mapping[str, Any]) -> int:
    """Weights and biases of the spec's network."""
    return Network.parameter_count(layer_sizes(spec))


def snapshot_bytes(spec: Mapping[str, Any]) -> int:
    """At most how many bytes one snapshot (one version) of this spec takes."""
    parameters = parameter_count(spec)
    vectors = 1 + _STATE_VECTORS[spec["training"]["optimizer"]]
    inputs = input_width(spec)
    classes = 2 if spec["task"] == "binary" else (
        len(spec["classes"]) if spec["task"] == "multiclass" else 0)
    histogram = 2 * AUC_BINS if spec["task"] == "binary" else 0
    numbers = vectors * parameters + 3 * inputs + 2 + 1 + 5 + classes ** 2 + histogram
    # Deflate may add 5 bytes per 16 KiB stored block to data it cannot shrink.
    data = math.ceil(FLOAT_BYTES * numbers * (1 + 5 / 16384))
    spec_text = len(json.dumps(spec, sort_keys=True).encode("utf-8"))
    arrays = _FIXED_ARRAYS + vectors
    return data + spec_text + _META_OVERHEAD + arrays * _ARRAY_OVERHEAD


def min_checkpoint_every(spec: Mapping[str, Any], bytes_per_record: int) -> int:
    """The smallest `checkpoint_every` that writes at most `bytes_per_record`
    snapshot bytes per record between versions."""
    return max(1, math.ceil(snapshot_bytes(spec) / bytes_per_record))
