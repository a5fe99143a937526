"""The portable compiled plan: one live plan version as a versioned JSON document that a calling
system can evaluate itself (`apportion/lookup.py` in Python, `js/apportion-lookup.mjs` in Node).

The format is specified in docs/compiled-plan.md; this module only writes it. The document carries
exactly what `CompiledPlan.assign` uses: the hash parameters (the 16-byte BLAKE2b salt parameter
derived from the plan's salt, so an evaluator needs no second BLAKE2b configuration), the holdout
share and arm, the feature kinds, the tree in pre-order, and the cumulative shares per cohort with
the server's exact float64 values (JSON numbers are written with the shortest round-trip repr, so a
reader gets the same doubles back). `content_hash` is SHA-256 over the canonical JSON of every
other field; it is the route's ETag.
"""

from __future__ import annotations

import hashlib
import json
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:  # index.py builds its single-lookup evaluator from this document
    from apportion.serving.index import CompiledPlan

FORMAT = "apportion-compiled-plan"
FORMAT_VERSION = 1
PURPOSES = {"holdout": "holdout", "arm": "arm"}  # BLAKE2b personalisation of each draw


def _canonical(doc: dict[str, Any]) -> bytes:
    return json.dumps(doc, sort_keys=True, separators=(",", ":"), ensure_ascii=True).encode()


def _nodes(cp: CompiledPlan) -> list[dict[str, Any]]:
    """The reachable tree in pre-order (root first, then the left subtree, then the right), each
    node an object; children are indices into the list."""
    t = cp.tree
    levels_by_code = [{code: lv for lv, code in lut.items()} for lut in t.level_codes]
    order: list[int] = []
    stack = [0]
    while stack:
        nd = stack.pop()
        order.append(nd)
        if not t.is_leaf[nd]:
            stack.extend((int(t.node_right[nd]), int(t.node_left[nd])))
    index = {nd: i for i, nd in enumerate(order)}
    out: list[dict[str, Any]] = []
    for nd in order:
        if t.is_leaf[nd]:
            out.append({"cohort": int(t.node_cohort[nd])})
            continue
        fi = int(t.node_feature[nd])
        node: dict[str, Any] = {"feature": fi}
        if t.node_is_numeric[nd]:
            node["threshold"] = float(t.node_threshold[nd])
        else:
            dirs = t.node_directions[nd]
            names = levels_by_code[fi]
            node["left_levels"] = [names[c] for c in sorted(names) if dirs[c] == 1]
            node["right_levels"] = [names[c] for c in sorted(names) if dirs[c] == 0]
        node["left"] = index[int(t.node_left[nd])]
        node["right"] = index[int(t.node_right[nd])]
        node["default"] = "left" if t.node_default_left[nd] else "right"
        out.append(node)
    return out


def compiled_document(cp: CompiledPlan) -> dict[str, Any]:
    """The document of one compiled plan version (a new dict each call)."""
    salt_param = hashlib.blake2b(cp.salt.encode("utf-8"), digest_size=16).hexdigest()
    doc: dict[str, Any] = {
        "format": FORMAT,
        "format_version": FORMAT_VERSION,
        "plan": cp.plan,
        "plan_version": cp.version,
        "revision": cp.revision,
        "hashing": {
            "function": "blake2b",
            "digest_bytes": 8,
            "salt_hex": salt_param,
            "person": dict(PURPOSES),
        },
        "arms": list(cp.arm_keys),
        "holdout": {"share": cp.holdout_share, "arm": cp.holdout_arm},
        "features": [{"key": f.key, "kind": f.kind} for f in cp.feature_specs.values()],
        "nodes": _nodes(cp),
        "cumulative": [list(row) for row in cp._cum_lists],
    }
    doc["content_hash"] = "sha256:" + hashlib.sha256(_canonical(doc)).hexdigest()
    return doc


def document_bytes(cp: CompiledPlan) -> tuple[bytes, str]:
    """(the document as compact JSON bytes, its content hash); cached on the compiled plan, which
    is immutable, so a poll costs one dictionary lookup."""
    cached = cp._portable
    if not cached:
        doc = compiled_document(cp)
        cached.append((json.dumps(doc, separators=(",", ":")).encode(), doc["content_hash"]))
    return cached[0]
