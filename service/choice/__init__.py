"""The numerical core: pure functions on NumPy arrays, no Flask and no I/O."""

from service.choice.aggregate import AggregateResult
from service.choice.batch import Batch, BatchProblem
from service.choice.checks import BatchCheck, check_batch
from service.choice.compiled import CompiledModel, compile_model
from service.choice.elasticities import Elasticities
from service.choice.errors import ScoringError
from service.choice.scenarios import (
    Change,
    Outcome,
    ScenarioResult,
    Variant,
    VariantOutcome,
    run_scenarios,
)
from service.choice.scoring import EULER_GAMMA, ScoreOptions, ScoreResult, score
from service.choice.spec import (
    Coefficients,
    ModelSpec,
    Problem,
    SpecError,
    spec_from_dict,
    spec_to_dict,
    validate_model,
)
from service.choice.uncertainty import WillingnessToPay, willingness_to_pay

__all__ = [
    "EULER_GAMMA",
    "AggregateResult",
    "Batch",
    "BatchCheck",
    "BatchProblem",
    "Change",
    "Coefficients",
    "CompiledModel",
    "Elasticities",
    "ModelSpec",
    "Outcome",
    "Problem",
    "ScenarioResult",
    "ScoreOptions",
    "ScoreResult",
    "ScoringError",
    "SpecError",
    "Variant",
    "VariantOutcome",
    "WillingnessToPay",
    "check_batch",
    "compile_model",
    "run_scenarios",
    "score",
    "spec_from_dict",
    "spec_to_dict",
    "validate_model",
    "willingness_to_pay",
]
