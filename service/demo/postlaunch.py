"""Post-launch rows for the guardrail watch: learners of the invented scenario assigned by a live
compiled plan, their outcomes simulated under the arm they got (optionally with an injected harm),
written in the monitor upload format (member_id, features, holdout, metric columns)."""

from __future__ import annotations

import io
from typing import Any

import numpy as np

from service.demo import scenario
from service.serving.columns import lookup_columns
from service.serving.index import CompiledPlan


def post_launch_csv(
    compiled: CompiledPlan, n: int, seed: int, *, harm: Any = None, id_prefix: str = "m"
) -> bytes:
    import pyarrow as pa
    import pyarrow.csv as pacsv

    ids, fv = scenario.simulate_features(n, seed)
    ids = np.array([f"{id_prefix}{i}" for i in range(n)], dtype=object)
    features = scenario.FEATURES
    answers = compiled.assign_columns(list(ids), lookup_columns(features, fv))
    codes = np.array([scenario.ARMS.index(a.arm) for a in answers], dtype=np.int64)
    holdout = np.array([a.holdout for a in answers])
    table = scenario.simulate(n, seed, arm=codes, harm=harm)
    csv = scenario.to_csv_bytes(table)
    t = pacsv.read_csv(io.BytesIO(csv))
    t = t.drop(["unit_id", "arm"])
    t = t.add_column(0, "member_id", pa.array(ids.astype(str)))
    t = t.append_column("holdout", pa.array(holdout))
    buf = io.BytesIO()
    pacsv.write_csv(t, buf)
    return buf.getvalue()
