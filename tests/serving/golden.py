"""Golden vectors for the portable evaluators (apportion/lookup.py, js/apportion-lookup.mjs).

Each file tests/golden/<name>.json holds a compiled plan document made by the server
(`compile_plan` + `portable.compiled_document`, what `GET /v1/plans/{plan}/compiled` returns),
a generator seed, 40 explicit vectors (member id, features, expected answer, or expected error),
and the SHA-256 of the server's answers to 100,000 generated members in 100 chunks of 1,000. The
members are not stored: both test suites regenerate them from the seed with the procedure below
(written twice, here and in js/test/lookup.test.mjs), which keeps the files small.

Member i of seed s: d = SHA-256(f"{s}:{i}") (32 bytes).
- id: base = "u" + hex(d[1:5]) + "-" + i; by d[0] % 8: 0 " "+base+" ", 1 "\\t"+base,
  2 "\\u3000"+base+"\\x85", 3 "é"+base, 4 "会員-"+base, else base.
- feature j (plan order, j < 13): a = d[5 + 2j], b = d[6 + 2j]; a < 20: key left out;
  a < 32: null; else numeric: candidates[b % len] where candidates are, for the sorted distinct
  thresholds t of that feature in the document, t - 1, t - 0.001, t, t + 0.001, t + 1 and
  floor(t) as an integer (or [0] when the feature has no split); categorical: the sorted
  distinct levels of the feature's nodes plus "zz-unseen", picked by b % len.
Answer line: f"{arm}|{cohort}|{1 if holdout else 0}|{','.join(defaults_used)}\\n"; chunk k
hashes the UTF-8 lines of members 1000k .. 1000k + 999.

Regenerate with `.venv/bin/python tests/serving/golden.py` (only when the format or the plans
change on purpose: the digests pin the server's answers, so sticky assignment is tested too).
"""

from __future__ import annotations

import hashlib
import json
import math
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
GOLDEN = ROOT / "tests" / "golden"
MEMBERS = 100_000
CHUNK = 1_000
EXPLICIT = 40


def candidates(doc: dict[str, Any]) -> list[list[Any]]:
    """Per feature (plan order), the values the generator picks from."""
    out: list[list[Any]] = []
    for fi, f in enumerate(doc["features"]):
        nodes = [nd for nd in doc["nodes"] if nd.get("feature") == fi]
        if f["kind"] == "numeric":
            ts = sorted({nd["threshold"] for nd in nodes})
            vals: list[Any] = []
            for t in ts:
                vals += [t - 1.0, t - 0.001, t, t + 0.001, t + 1.0, int(math.floor(t))]
            out.append(vals or [0])
        else:
            lv = sorted({x for nd in nodes for x in nd["left_levels"] + nd["right_levels"]})
            out.append([*lv, "zz-unseen"])
    return out


_DECORATE: tuple[Callable[[str], str], ...] = (
    lambda b: " " + b + " ",
    lambda b: "\t" + b,
    lambda b: "\u3000" + b + "\x85",
    lambda b: "é" + b,
    lambda b: "会員-" + b,
)


def member(doc: dict[str, Any], cands: list[list[Any]], seed: int, i: int) -> tuple[str, dict]:
    d = hashlib.sha256(f"{seed}:{i}".encode()).digest()
    base = f"u{d[1:5].hex()}-{i}"
    k = d[0] % 8
    mid = _DECORATE[k](base) if k < len(_DECORATE) else base
    feats: dict[str, Any] = {}
    for j, f in enumerate(doc["features"][:13]):
        a, b = d[5 + 2 * j], d[6 + 2 * j]
        if a < 20:
            continue
        if a < 32:
            feats[f["key"]] = None
            continue
        c = cands[j]
        feats[f["key"]] = c[b % len(c)]
    return mid, feats


def answer_line(a: Any) -> str:
    d = a if isinstance(a, dict) else a.to_dict()
    return f"{d['arm']}|{d['cohort']}|{1 if d['holdout'] else 0}|{','.join(d['defaults_used'])}\n"


def members(doc: dict[str, Any], seed: int, n: int = MEMBERS) -> tuple[list[str], list[dict]]:
    cands = candidates(doc)
    pairs = [member(doc, cands, seed, i) for i in range(n)]
    return [p[0] for p in pairs], [p[1] for p in pairs]


def chunk_digests(lines: list[str]) -> list[str]:
    return [
        hashlib.sha256("".join(lines[k : k + CHUNK]).encode()).hexdigest()
        for k in range(0, len(lines), CHUNK)
    ]


# ---- the plans (built by the server's own compiler) -----------------------------------------
def _plans() -> list[tuple[str, Any, str]]:
    """(name, CompiledPlan, what it covers)."""
    from serving.serving_helpers import FEATURES, hand_partition

    from apportion.serving.index import PlanParts, compile_plan
    from apportion.stats.partition import Partition
    from bench.serve_inprocess import random_partition

    rng = np.random.default_rng(20261203)
    out = []
    p = random_partition(rng, depth=6, n_cohorts=12)
    alloc = rng.dirichlet(np.ones(3), size=p.n_cohorts)
    out.append(
        (
            "mixed-holdout",
            compile_plan(PlanParts(plan="mixed-holdout", version=3, partition=p, allocation=alloc,
                         arm_keys=("control", "short", "long"), holdout_share=0.1,
                         holdout_arm="control", salt="golden-salt-one", revision=4)),
            "depth 6, 12 cohorts, mixed shares over 3 arms, 10 % holdout",
        )
    )  # fmt: skip
    p = random_partition(rng, depth=8, n_cohorts=40)
    alloc = np.eye(4)[rng.integers(4, size=p.n_cohorts)]
    out.append(
        (
            "pure-no-holdout",
            compile_plan(PlanParts(plan="pure-no-holdout", version=1, partition=p, allocation=alloc,
                         arm_keys=("a", "b", "c", "d"), holdout_share=0.0, holdout_arm="a",
                         salt="golden-salt-two")),
            "depth 8, 40 cohorts, one arm per cohort, no holdout",
        )
    )  # fmt: skip
    p = hand_partition()
    alloc = np.array([[0.5, 0.0, 0.5, 0.0], [0.0, 0.0, 0.0, 1.0], [0.25, 0.25, 0.25, 0.25]])
    out.append(
        (
            "hand-zero-shares",
            compile_plan(PlanParts(plan="hand-zero-shares", version=7, partition=p, allocation=alloc,
                         arm_keys=("five", "ten", "fifteen", "adaptive"), holdout_share=0.25,
                         holdout_arm="ten", salt="s\u00e9l-\u4f1a", revision=9)),
            "named features (unseen levels at a node), zero-share arms, 25 % holdout to an arm"
            " no cohort gets",
        )
    )  # fmt: skip
    leaf = Partition.from_dict(
        {
            "features": [
                {"key": f.key, "kind": f.kind, "levels": list(f.levels)} for f in FEATURES
            ],
            "nodes": [
                {"feature": -1, "threshold": None, "left_levels": [], "right_levels": [],
                 "left": -1, "right": -1, "default_left": True, "cohort": 0}
            ],
            "n_cohorts": 1,
        }
    )  # fmt: skip
    out.append(
        (
            "single-cohort",
            compile_plan(PlanParts(plan="single-cohort", version=2, partition=leaf,
                         allocation=np.array([[0.2, 0.3, 0.5]]), arm_keys=("x", "y", "z"),
                         holdout_share=0.05, holdout_arm="z", salt="golden-salt-four")),
            "no split at all: one cohort, mixed shares, 5 % holdout",
        )
    )  # fmt: skip
    return out


_ERRORS = [
    ("bad-type", lambda doc: ("m-err", {doc["features"][0]["key"]: True})),
    ("empty-id", lambda doc: ("   ", {})),
]


def write() -> None:
    from apportion.serving.portable import compiled_document

    GOLDEN.mkdir(parents=True, exist_ok=True)
    for k, (name, cp, about) in enumerate(_plans()):
        doc = compiled_document(cp)
        seed = 1000 + k
        ids, feats = members(doc, seed)
        single = [cp.assign(m, f) for m, f in zip(ids, feats, strict=True)]
        batch = cp.assign_batch(ids, feats)
        assert single == batch, name  # the server's two paths agree before anything is written
        lines = [answer_line(a) for a in batch]
        vectors = [
            {"member_id": ids[i], "features": feats[i], "expect": batch[i].to_dict()}
            for i in range(EXPLICIT)
        ]
        errors = [
            {"member_id": m, "features": f, "expect_error": why}
            for why, make in _ERRORS
            for m, f in [make(doc)]
        ]
        out = {
            "about": about,
            "document": doc,
            "seed": seed,
            "members": MEMBERS,
            "chunk": CHUNK,
            "chunk_sha256": chunk_digests(lines),
            "vectors": vectors,
            "errors": errors,
        }
        path = GOLDEN / f"{name}.json"
        path.write_text(json.dumps(out, ensure_ascii=False, separators=(",", ":")) + "\n")
        print(f"wrote {path} ({path.stat().st_size} bytes)")


if __name__ == "__main__":
    sys.path[:0] = [str(ROOT), str(ROOT / "tests")]
    write()
