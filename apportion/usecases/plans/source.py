"""What a plan version is built from: the fitted cohort model, its experiment's declaration, the
readout's rows (read on first use), and the live version's arm mix re-expressed in the model's
cohorts (the `live` baseline)."""

from __future__ import annotations

from typing import Any

import numpy as np

from apportion.errors import InvalidInput
from apportion.serving.columns import lookup_columns
from apportion.stats.partition import Partition
from apportion.stats.table import UnitTable
from apportion.store import experiments as exp_repo
from apportion.store import models as model_repo
from apportion.store import plans as repo
from apportion.usecases import live
from apportion.usecases.cellstats import Rows, readout_rows
from apportion.usecases.context import Services
from apportion.usecases.experiments import specs_of


def model_context(services: Services, model_id: int) -> dict[str, Any]:
    with services.db.read() as s:
        row = model_repo.get_model(session=s, model_id=model_id)
        if row.status != "done":
            raise InvalidInput(
                f"cohort model {model_id} is {row.status}; a plan needs a fitted model",
                errors=[{"field": "model_id", "problem": f"model is {row.status}"}],
            )
        exp = s.get(exp_repo.Experiment, row.experiment_id)
        assert exp is not None
        result, declaration, readout_id = row.result, exp.declaration, row.readout_id
        assert result is not None  # a done model has its fit
        model_method, model_params = row.method, dict(row.params or {})
    return {
        "result": result,
        "specs": specs_of(declaration),
        "load_rows": lambda: readout_rows(services, readout_id=readout_id, seed=0),
        "experiment": declaration["key"],
        "partition": Partition.from_dict(result["partition"]),
        "model_id": model_id,
        "model_method": model_method,
        "model_params": model_params,
    }


def rows_of(ctx: dict[str, Any]) -> Rows:
    """The readout's rows, read on first use: all of them, or above the in-memory limit a uniform
    sample of that many (the draft's estimates come from the model's stored cell moments, never
    from rows; only the held-out evaluation, the live baseline and the diff against live read
    rows, and they say when they ran on a sample)."""
    if "rows" not in ctx:
        ctx["rows"] = ctx["load_rows"]()
    return ctx["rows"]


def table_columns(table: UnitTable) -> dict[str, list[Any]]:
    """Feature columns as the lookup takes them."""
    return lookup_columns(table.features, table.feature_values)


def live_allocation_on(services: Services, plan: str, ctx: dict[str, Any]) -> np.ndarray:
    """The live version's arm mix re-expressed in this model's cohorts: per readout row the live
    cohort's shares, averaged within each new cohort."""
    compiled = live.load_compiled(services.db, plan)
    if compiled is None:
        raise InvalidInput(
            f"baseline 'live' needs a live version of plan '{plan}'; it has none",
            errors=[{"field": "baseline", "problem": "no live version"}],
        )
    table: UnitTable = rows_of(ctx).table
    live_cohort = np.array(
        [a.cohort for a in compiled.assign_columns(list(table.unit_ids), table_columns(table))]
    )
    with services.db.read() as s:
        row = repo.get_version(session=s, plan=plan, version=compiled.version)
        live_matrix = np.array(row.allocation["matrix"])
    if tuple(row.allocation["arms"]) != tuple(ctx["specs"].arm_keys):
        raise InvalidInput(
            "baseline 'live' needs the live version to use the same arms",
            errors=[{"field": "baseline"}],
        )
    new_cohort, _ = ctx["partition"].route(table.feature_values, table.features)
    c = ctx["partition"].n_cohorts
    out = np.zeros((c, live_matrix.shape[1]))
    np.add.at(out, new_cohort, live_matrix[live_cohort])
    counts = np.bincount(new_cohort, minlength=c).astype(float)
    out[counts > 0] /= counts[counts > 0, None]
    out[counts == 0, 0] = 1.0
    return out
