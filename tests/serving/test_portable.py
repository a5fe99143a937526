"""The portable compiled plan and the dependency-free Python evaluator (apportion/lookup.py).

Golden files (tests/golden/*.json, made by tests/serving/golden.py from the server's compiler)
hold a document, explicit vectors and the SHA-256 of the server's answers to 100,000 generated
members in chunks. Here: the evaluator reproduces every chunk (zero disagreements), the server
still gives the committed answers (sticky across code changes), and the evaluator imports
nothing but the standard library. js/test/lookup.test.mjs checks the JavaScript evaluator on the
same files (run by `make test` through Node's test runner)."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest
from serving import golden

from apportion.lookup import LookupError as PortableError
from apportion.lookup import Plan
from apportion.serving.portable import compiled_document

FILES = sorted(golden.GOLDEN.glob("*.json"))


def _load(path: Path) -> dict:
    return json.loads(path.read_text())


def test_golden_files_cover_the_promised_cases() -> None:
    docs = [_load(p)["document"] for p in FILES]
    assert len(docs) >= 4
    shares = [d["holdout"]["share"] for d in docs]
    assert 0.0 in shares and any(s > 0 for s in shares)  # holdout off and on
    pure = [all(row[0] in (0.0, 1.0) for row in d["cumulative"]) for d in docs]
    assert any(pure) and not all(pure)  # pure and mixed plans
    kinds = {f["kind"] for d in docs for f in d["features"]}
    assert kinds == {"numeric", "categorical"}
    for p in FILES:  # missing and unknown values occur among the explicit vectors
        g = _load(p)
        if len(g["document"]["nodes"]) == 1:
            continue  # no split, so no default to take
        assert any(v["expect"]["defaults_used"] for v in g["vectors"]), p.name
        assert g["members"] == 100_000 and len(g["chunk_sha256"]) == 100


@pytest.mark.parametrize("path", FILES, ids=[p.stem for p in FILES])
def test_python_evaluator_agrees_with_the_server_on_100000_members(path: Path) -> None:
    g = _load(path)
    plan = Plan.from_document(g["document"])
    for v in g["vectors"]:
        assert plan.assign(v["member_id"], v["features"]).to_dict() == v["expect"]
    for e in g["errors"]:
        with pytest.raises(PortableError):
            plan.assign(e["member_id"], e["features"])
    ids, feats = golden.members(g["document"], g["seed"], g["members"])
    assert [[i, f] for i, f in zip(ids[:5], feats[:5], strict=True)] == [
        [v["member_id"], v["features"]] for v in g["vectors"][:5]
    ]
    lines = [golden.answer_line(plan.assign(m, f)) for m, f in zip(ids, feats, strict=True)]
    got = golden.chunk_digests(lines)
    bad = [k for k, (a, b) in enumerate(zip(got, g["chunk_sha256"], strict=True)) if a != b]
    assert bad == [], f"chunks with disagreements: {bad}"


def test_the_server_still_gives_the_golden_answers() -> None:
    """Rebuild each golden plan with the current compiler: the same document and, for the first
    20,000 members, the same answers (the committed chunk digests)."""
    sys.path.insert(0, str(golden.ROOT))  # golden plans reuse bench/serve_inprocess.py's tree
    for name, cp, _ in golden._plans():
        g = _load(golden.GOLDEN / f"{name}.json")
        assert compiled_document(cp) == g["document"], name
        ids, feats = golden.members(g["document"], g["seed"], 20_000)
        lines = [golden.answer_line(a) for a in cp.assign_batch(ids, feats)]
        assert golden.chunk_digests(lines) == g["chunk_sha256"][:20], name


def test_a_changed_document_is_caught() -> None:
    """The check can fail: one cumulative share moved changes some chunk's digest."""
    g = _load(golden.GOLDEN / "mixed-holdout.json")
    doc = json.loads(json.dumps(g["document"]))
    doc["cumulative"][0][0] = min(1.0, doc["cumulative"][0][0] + 0.2)
    plan = Plan.from_document(doc)
    ids, feats = golden.members(doc, g["seed"], 5_000)
    got = golden.chunk_digests(
        [golden.answer_line(plan.assign(m, f)) for m, f in zip(ids, feats, strict=True)]
    )
    assert got != g["chunk_sha256"][:5]


def test_lookup_module_needs_only_the_standard_library() -> None:
    """Loaded from its file alone in an isolated interpreter: no numpy, no service package."""
    src = Path(__file__).resolve().parents[2] / "apportion" / "lookup.py"
    code = (
        "import importlib.util, sys\n"
        f"spec = importlib.util.spec_from_file_location('lookup', {str(src)!r})\n"
        "m = importlib.util.module_from_spec(spec); sys.modules['lookup'] = m\n"
        "spec.loader.exec_module(m)\n"
        "bad = sorted(k for k in sys.modules if k.split('.')[0] in "
        "('numpy', 'apportion', 'pydantic', 'fastapi', 'scipy'))\n"
        "print(bad)\n"
    )
    out = subprocess.run(
        [sys.executable, "-I", "-c", code], capture_output=True, text=True, check=True
    )
    assert out.stdout.strip() == "[]"


def test_document_rejects_other_formats() -> None:
    doc = _load(FILES[0])["document"]
    with pytest.raises(PortableError, match="format_version"):
        Plan.from_document({**doc, "format_version": 2})
    with pytest.raises(PortableError, match="not a compiled plan"):
        Plan.from_document({**doc, "format": "something-else"})


def test_digest_bounds_decide_exactly_as_the_float_draw() -> None:
    """`digest < digest_bound(t)` is `u < t` for every draw u: checked at the thresholds where it
    could go wrong (t equal to the draw, one double above and below it, 0 and 1) for 2,000
    random digests, and at the extreme digests. The float side is the formula of the format
    (docs/compiled-plan.md), computed with Python's own ints and floats."""
    import math
    import random

    from apportion.lookup import digest_bound

    rng = random.Random(11)
    digests = [rng.getrandbits(64).to_bytes(8, "big") for _ in range(2000)]
    digests += [b"\x00" * 8, b"\xff" * 8, (2047).to_bytes(8, "big"), (2048).to_bytes(8, "big")]
    disagreements = 0
    for d in digests:
        u = (int.from_bytes(d, "big") >> 11) * 2.0**-53
        for t in (u, math.nextafter(u, 2.0), math.nextafter(u, -1.0), 0.0, 1.0, rng.random()):
            disagreements += (d < digest_bound(t)) != (u < t)
    assert disagreements == 0
