"""A cohort model's resolved parameters, one model per method (every default filled in).

The bounds and defaults live with the methods (apportion/stats/models.py, `PARAMS`); these models
describe the answer, and a test checks that each one names exactly the parameters of its method.
The stored parameters carry no method key, so the method of the answer they belong to picks the
model: the answer's validator tags the raw parameters with it (`for_method`), and the union's
discriminator reads the tag (a fitted model's `method`, or a comparison's key per method)."""

from __future__ import annotations

from typing import Annotated, Any, Literal

from pydantic import BaseModel, Discriminator, Field, Tag

from apportion.schemas.common import Answer


class _Common(Answer):
    seed: int | None = Field(
        None,
        description="random seed; a fitted model's always, left out of a comparison's (each "
        "fold's fit takes the comparison's seed plus the fold)",
    )
    features: list[str] = Field(description="the features the method may split on")
    min_units_per_arm: int = Field(description="fewest units per arm in a cohort")
    success_metric: str | None = Field(
        None,
        description="the metric that orders categorical levels (a fitted model's, maybe null; "
        "left out of a comparison's)",
    )


class _Honest(_Common):
    estimation_fraction: float = Field(description="share of units kept for the estimates")
    max_bins: int = Field(description="quantile bins per numeric feature")
    max_depth: int


class PricedGuardrail(Answer):
    """A guardrail whose price shapes a decision-focused partition."""

    metric: str
    threshold: float
    unit: Literal["absolute", "relative"]


class _Decision(_Honest):
    guardrails: list[PricedGuardrail]
    rounds: int = Field(description="price-update rounds of the Lagrangian splitting")
    split_z: float = Field(description="standard errors a split's gain must clear")
    price_z: float = Field(description="standard errors the priced thresholds are tightened by")
    folds: int = Field(description="cross-fitting folds of the outcome model")


class _Boosted(Answer):
    learning_rate: float
    max_iter: int
    max_leaf_nodes: int
    min_samples_leaf: int
    l2_regularization: float
    max_train_rows: int


class GlobalParams(_Common):
    pass


class SegmentsParams(_Common):
    bins: dict[str, int] = Field(description="quantile bins per numeric feature")


class CausalTreeParams(_Honest):
    min_gain: float
    metric_weights: dict[str, float] = Field(description="weight of each metric in the splits")
    cv_folds: int = Field(description="cross-validated pruning folds; 0 is off")
    cv_rule: Literal["best", "one_se"]


class IntersectParams(_Honest):
    min_gain: float


class TwoModelParams(_Decision, _Boosted):
    pass


class ForestParams(_Decision):
    n_trees: int
    sample_fraction: float
    max_tree_units: int
    forest_max_depth: int
    forest_min_units: int
    mtry: int = Field(description="features per tree; 0 is automatic")


class PolicyTreeParams(_Decision, _Boosted):
    outcome_model: Literal["arm_means", "boosted"]


PARAMS_BY_METHOD: dict[str, type[Answer]] = {
    "global": GlobalParams,
    "segments": SegmentsParams,
    "causal_tree": CausalTreeParams,
    "intersect": IntersectParams,
    "two_model": TwoModelParams,
    "forest": ForestParams,
    "policy_tree": PolicyTreeParams,
}

_METHOD_OF: dict[type[BaseModel], str] = {model: m for m, model in PARAMS_BY_METHOD.items()}


class _ForMethod(dict[str, Any]):
    """Raw parameters tagged with the method whose answer they belong to."""

    __slots__ = ("method",)
    method: str


def for_method(method: Any, raw: Any) -> Any:
    """`raw` tagged with `method` for the `MethodParams` union; anything else as it is."""
    if not isinstance(raw, dict) or not isinstance(method, str):
        return raw
    tagged = _ForMethod(raw)
    tagged.method = method
    return tagged


def _method_tag(value: Any) -> str | None:
    if isinstance(value, _ForMethod):
        return value.method
    return _METHOD_OF.get(type(value))


MethodParams = Annotated[
    Annotated[GlobalParams, Tag("global")]
    | Annotated[SegmentsParams, Tag("segments")]
    | Annotated[CausalTreeParams, Tag("causal_tree")]
    | Annotated[IntersectParams, Tag("intersect")]
    | Annotated[TwoModelParams, Tag("two_model")]
    | Annotated[ForestParams, Tag("forest")]
    | Annotated[PolicyTreeParams, Tag("policy_tree")],
    Discriminator(_method_tag),
]
