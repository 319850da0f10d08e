"""Keelson's numeric core: pure NumPy.

No I/O, no globals, no environment: everything comes in as arguments (random
state as a seed) and goes out as arrays or bytes. It imports neither Flask nor
SQLAlchemy and is usable and testable on its own; service/ decides where bytes live.

Reading order: `activations` (the one table of element-wise functions) and
`heads` (the losses on them); `network` (parameters and layout) and `kernel`
(the one forward and one backward pass, over a workspace); then the callers:
`online` (one record per step), `batch` (mini-batch epochs), `input_gradients`
and `attribution` (explanations); `optimizers` (SGD, Adam) step the gradient
the kernel writes. `learner` ties them to `encoding`, `metrics` and `snapshot`.
`sweeps` score a record as one field moves.
`track_record` keeps live metrics of served scores and the Page-Hinkley alarm.
"""

from engine.attribution import DEFAULT_SAMPLES, Explanation, explain
from engine.attribution import EXACT_FIELDS as SHAPLEY_EXACT_FIELDS
from engine.attribution import METHODS as EXPLANATION_METHODS
from engine.batch import FitReport
from engine.encoding import Encoder
from engine.errors import (
    EngineError,
    InvalidInputError,
    NonFiniteError,
    SnapshotError,
    TrainingCancelled,
)
from engine.learner import Learner
from engine.metrics import Prequential, batch_metrics
from engine.network import Network
from engine.spec import (
    ACTIVATIONS,
    FEATURE_TYPES,
    LEGACY_LR_SCHEDULES,
    LEGACY_TRAINING_KEYS,
    LOSSES,
    LR_SCHEDULES,
    OPTIMIZERS,
    PROMOTIONS,
    TASKS,
    TRAINING_DEFAULTS,
    apply_defaults,
    spec_hash,
    upgrade_legacy_spec,
)
from engine.sweeps import sweep, sweep_grid

__all__ = [
    "ACTIVATIONS",
    "DEFAULT_SAMPLES",
    "EXPLANATION_METHODS",
    "SHAPLEY_EXACT_FIELDS",
    "FEATURE_TYPES",
    "LEGACY_LR_SCHEDULES",
    "LEGACY_TRAINING_KEYS",
    "LOSSES",
    "LR_SCHEDULES",
    "OPTIMIZERS",
    "PROMOTIONS",
    "TASKS",
    "TRAINING_DEFAULTS",
    "EngineError",
    "Encoder",
    "Explanation",
    "FitReport",
    "InvalidInputError",
    "Learner",
    "Network",
    "NonFiniteError",
    "Prequential",
    "SnapshotError",
    "TrainingCancelled",
    "apply_defaults",
    "batch_metrics",
    "explain",
    "spec_hash",
    "sweep",
    "sweep_grid",
    "upgrade_legacy_spec",
]
