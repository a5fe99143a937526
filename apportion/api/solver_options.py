"""Solver options, declared per plan method with bounds (pydantic): anything else is a 422.

The bounds keep one request's work within seconds on a small machine and every value inside the
range its solver is defined on: the cutting-plane loop of `chance` (and of pure `stochastic`
plans) takes at most `max_iter` rounds; stochastic approximation runs `iterations` steps of
`batch` draws (about 66 microseconds a step at the default batch, so the largest run is a few
seconds, not the eleven minutes ten million steps would take). Defaults live with the solvers
(apportion/optimize); only the options a caller sets are passed on.
"""

from __future__ import annotations

from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError


class _Options(BaseModel):
    model_config = ConfigDict(extra="forbid", allow_inf_nan=False, strict=True)

    presolve: bool | None = Field(None, description="let HiGHS presolve the LP (default false)")
    bind_tol: float | None = Field(
        None, gt=0, le=1, description="how close to its threshold a guardrail counts as binding"
    )


class DeterministicOptions(_Options):
    pass


class ChanceOptions(_Options):
    tol: float | None = Field(
        None, gt=0, le=0.1, description="cutting planes: allowed violation (default 0.001)"
    )
    max_iter: int | None = Field(None, ge=1, le=200, description="cutting-plane rounds (60)")


class StochasticOptions(ChanceOptions):
    tol: float | None = Field(
        None, gt=0, le=1, description="allowed normalized violation (default 0.01; 0.001 pure)"
    )
    iterations: int | None = Field(
        None, ge=100, le=100_000, description="stochastic-approximation steps (default 40000)"
    )
    batch: int | None = Field(None, ge=2, le=4096, description="draws per step (default: auto)")
    noise_allowance: float | None = Field(None, ge=0, le=10, description="standard errors (2)")
    start: float | None = Field(None, ge=0, lt=1, description="share of steps before averaging")
    step: float | None = Field(None, gt=0, le=1000, description="step-size multiplier (10)")
    sampler: Literal["marginal", "cells"] | None = None
    repair: bool | None = Field(None, description="scale toward the baseline until CVaR holds")
    tail: float | None = Field(
        None, ge=0.01, le=1, description="CVaR tail share (default 1 - confidence; 1 = the mean)"
    )


OPTIONS_BY_METHOD: dict[str, type[_Options]] = {
    "deterministic": DeterministicOptions,
    "chance": ChanceOptions,
    "stochastic": StochasticOptions,
}


SolverOptions = DeterministicOptions | ChanceOptions | StochasticOptions


def options_for(method: str, options: Any) -> _Options | None:
    """`options` checked against `method`'s model; a ValueError naming every bad option otherwise
    (inside a pydantic validator it becomes a 422 on the field `options`)."""
    if options is None or isinstance(options, _Options):
        return options
    model = OPTIONS_BY_METHOD.get(method, StochasticOptions)
    try:
        return model.model_validate(options)
    except ValidationError as exc:
        parts = []
        for e in exc.errors():
            name = ".".join(str(p) for p in e["loc"]) or "options"
            if e["type"] == "extra_forbidden":
                known = ", ".join(sorted(model.model_fields))
                parts.append(f"'{name}' is not an option of method '{method}' (known: {known})")
            else:
                parts.append(f"'{name}': {e['msg']}")
        raise ValueError("; ".join(parts)) from None
