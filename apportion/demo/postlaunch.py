"""Post-launch rows for the guardrail watch: learners of the invented scenario assigned by a live
plan, their outcomes simulated under the arm they got (optionally with an injected harm), written
in the monitor upload format (member_id, features, holdout, metric columns)."""

from __future__ import annotations

import io
from typing import Any

import numpy as np

from apportion.demo import scenario
from apportion.serving.columns import lookup_columns
from apportion.serving.index import CompiledPlan


def harm_to_beginners(points: float = 0.15) -> Any:
    """An invented harm: every non-control arm raises beginners' abandonment by `points`."""

    def harm(fv: dict[str, np.ndarray], arm: np.ndarray) -> dict[str, np.ndarray]:
        return {"abandon_rate": np.where((fv["level"] == 0) & (arm != 0), points, 0.0)}

    return harm


def rows_csv(
    member_ids: np.ndarray,
    n: int,
    seed: int,
    arm_codes: np.ndarray,
    holdout: np.ndarray,
    *,
    harm: Any = None,
) -> bytes:
    """The upload body for learners `simulate_features(n, seed)` who got `arm_codes`."""
    import pyarrow as pa
    import pyarrow.csv as pacsv

    table = scenario.simulate(n, seed, arm=np.asarray(arm_codes, dtype=np.int64), harm=harm)
    t = pacsv.read_csv(io.BytesIO(scenario.to_csv_bytes(table))).drop(["unit_id", "arm"])
    t = t.add_column(0, "member_id", pa.array(np.asarray(member_ids).astype(str)))
    t = t.append_column("holdout", pa.array(np.asarray(holdout, dtype=bool)))
    buf = io.BytesIO()
    pacsv.write_csv(t, buf)
    return buf.getvalue()


def post_launch_csv(
    compiled: CompiledPlan, n: int, seed: int, *, harm: Any = None, id_prefix: str = "m"
) -> bytes:
    """Learners assigned in process by `compiled` (tests); the demo asks the HTTP lookup instead."""
    _, fv = scenario.simulate_features(n, seed)
    ids = np.array([f"{id_prefix}{i}" for i in range(n)], dtype=object)
    answers = compiled.assign_columns(list(ids), lookup_columns(scenario.FEATURES, fv))
    codes = np.array([scenario.ARMS.index(a.arm) for a in answers], dtype=np.int64)
    holdout = np.array([a.holdout for a in answers])
    return rows_csv(ids, n, seed, codes, holdout, harm=harm)
