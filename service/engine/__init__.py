"""The associative-memory engine: pure numpy, no web, storage or settings code.

Learning rules (:mod:`.rules`), settling dynamics (:mod:`.dynamics`), verdicts
(:mod:`.verdict`) and capacity reports (:mod:`.capacity`) work on plain arrays; the codec
(:mod:`.codec`) turns records into ±1 patterns and back.
"""

from .calibration import CalibrationResult, calibrate
from .capacity import CapacityReport, capacity_report, hebbian_bit_error
from .codec import (
    CODEC_VERSION,
    IDENTITY_BLOCK,
    KINDS,
    MAX_FIELDS,
    MAX_UNITS,
    Codec,
    FieldMatch,
    FieldSpec,
    Schema,
)
from .dynamics import MAX_STEPS, MODES, SettleResult, settle
from .errors import (
    DependentMemoryError,
    EmptyMemoryError,
    EngineError,
    ParameterError,
    RecordError,
    SchemaError,
    ShapeError,
    StateValueError,
)
from .rules import (
    RULE_NAMES,
    DenseRule,
    HebbianRule,
    MemoryRule,
    ProjectionRule,
    StorkeyRule,
    default_beta,
    make_rule,
)
from .verdict import Verdict, VerdictBatch, VerdictThresholds, chance_ceiling, judge

__all__ = [
    "CODEC_VERSION",
    "IDENTITY_BLOCK",
    "KINDS",
    "MAX_FIELDS",
    "MAX_STEPS",
    "MAX_UNITS",
    "MODES",
    "RULE_NAMES",
    "CalibrationResult",
    "CapacityReport",
    "Codec",
    "DenseRule",
    "DependentMemoryError",
    "EmptyMemoryError",
    "EngineError",
    "FieldMatch",
    "FieldSpec",
    "HebbianRule",
    "MemoryRule",
    "ParameterError",
    "ProjectionRule",
    "RecordError",
    "Schema",
    "SchemaError",
    "SettleResult",
    "ShapeError",
    "StateValueError",
    "StorkeyRule",
    "Verdict",
    "VerdictBatch",
    "VerdictThresholds",
    "calibrate",
    "capacity_report",
    "chance_ceiling",
    "default_beta",
    "hebbian_bit_error",
    "judge",
    "make_rule",
    "settle",
]
