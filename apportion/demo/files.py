"""The three files of the README's first terminal session, from the invented demo scenario:
`experiment.json` (the declaration), `readout.csv` (simulated learners) and `plan.json` (the
draft's spec: success metric, the scenario's guardrails, method, holdout). `apportion demo
files DIR` writes them; tests/cli/test_first_session.py runs the README's commands on them.

The declaration marks `age_band` as not for personalization, to show the flag in a first
session (the scenario's effects do not depend on it; the README's cautions say why a real age
band needs legal review)."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

from apportion.demo import scenario as sc

FILES = ("experiment.json", "readout.csv", "plan.json")
AGE_BAND_REASON = "an age band: kept out of personalization until legal review"


def session_declaration() -> dict[str, Any]:
    decl = sc.experiment_declaration()
    for f in decl["features"]:
        if f["key"] == "age_band":
            f.update(personalize=False, reason=AGE_BAND_REASON)
    return decl


def session_plan_spec() -> dict[str, Any]:
    """The draft's spec; the command line adds the model (`--model`) and the comparison."""
    return {
        "success_metric": sc.SUCCESS,
        "guardrails": [dict(g) for g in sc.GUARDRAILS],
        "method": "chance",
        "allocation": "mixed",
        "holdout": {"share": 0.05},
        "notes": "first session on the invented lesson-length scenario",
    }


def write_session_files(
    directory: Path, *, learners: int = 20_000, seed: int = 1, overwrite: bool = False
) -> list[Path]:
    """Writes the three files into `directory` (made if missing); refuses (FileExistsError) to
    replace an existing one unless `overwrite`. Returns their paths in FILES order."""
    paths = [directory / name for name in FILES]
    taken = [p for p in paths if p.exists()]
    if taken and not overwrite:
        raise FileExistsError(", ".join(str(p) for p in taken))
    directory.mkdir(parents=True, exist_ok=True)
    paths[0].write_text(json.dumps(session_declaration(), indent=2) + "\n", encoding="utf-8")
    paths[1].write_bytes(sc.to_csv_bytes(sc.simulate(learners, seed=seed)))
    paths[2].write_text(json.dumps(session_plan_spec(), indent=2) + "\n", encoding="utf-8")
    return paths
