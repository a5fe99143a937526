// The JavaScript evaluator against the server's golden vectors (tests/golden/*.json; the format of
// those files and the member generator are described in tests/serving/golden.py). For each plan:
// the explicit vectors and error cases, then 100,000 members regenerated from the file's seed,
// whose answers must hash, chunk by chunk, to the server's digests: zero disagreements.
// Run with Node's own test runner: `node --test js/test/` (make test does).

import { test } from "node:test";
import assert from "node:assert/strict";
import { createHash } from "node:crypto";
import { readFileSync, readdirSync } from "node:fs";
import { dirname, join } from "node:path";
import { fileURLToPath } from "node:url";

import { Plan, LookupError, blake2bDraw, stripId } from "../apportion-lookup.mjs";

const GOLDEN = join(dirname(fileURLToPath(import.meta.url)), "..", "..", "tests", "golden");
const files = readdirSync(GOLDEN).filter((f) => f.endsWith(".json")).sort();

function candidates(doc) {
  return doc.features.map((f, fi) => {
    const nodes = doc.nodes.filter((nd) => nd.feature === fi);
    if (f.kind === "numeric") {
      const ts = [...new Set(nodes.map((nd) => nd.threshold))].sort((a, b) => a - b);
      const vals = [];
      for (const t of ts) vals.push(t - 1.0, t - 0.001, t, t + 0.001, t + 1.0, Math.floor(t));
      return vals.length ? vals : [0];
    }
    const lv = [...new Set(nodes.flatMap((nd) => [...nd.left_levels, ...nd.right_levels]))].sort();
    return [...lv, "zz-unseen"];
  });
}

const DECORATE = [
  (b) => " " + b + " ",
  (b) => "\t" + b,
  (b) => "\u3000" + b + "\x85",
  (b) => "é" + b,
  (b) => "会員-" + b,
];

function member(doc, cands, seed, i) {
  const d = createHash("sha256").update(`${seed}:${i}`).digest();
  const base = `u${d.subarray(1, 5).toString("hex")}-${i}`;
  const k = d[0] % 8;
  const id = k < DECORATE.length ? DECORATE[k](base) : base;
  const feats = {};
  doc.features.slice(0, 13).forEach((f, j) => {
    const a = d[5 + 2 * j], b = d[6 + 2 * j];
    if (a < 20) return;
    if (a < 32) { feats[f.key] = null; return; }
    feats[f.key] = cands[j][b % cands[j].length];
  });
  return [id, feats];
}

function line(a) {
  return `${a.arm}|${a.cohort}|${a.holdout ? 1 : 0}|${a.defaults_used.join(",")}\n`;
}

test("BLAKE2b draws equal Python's hashlib (values from hashlib.blake2b, digest_size=8)", () => {
  // computed with CPython 3.11 hashlib: blake2b(id, digest_size=8, salt=bytes.fromhex(SALT),
  // person=b"holdout"); top 53 bits of the big-endian digest times 2**-53
  const salt = "00112233445566778899aabbccddeeff";
  assert.equal(blake2bDraw(salt, "holdout", "a"), 0.9618382147236185);
  assert.equal(blake2bDraw(salt, "holdout", "member-1"), 0.012069473232617423);
  assert.equal(blake2bDraw(salt, "holdout", "x".repeat(128)), 0.6244117434799942); // one full block
  assert.equal(blake2bDraw(salt, "holdout", "y".repeat(129)), 0.1540044153761102); // two blocks
  assert.equal(blake2bDraw(salt, "holdout", "é会員".repeat(60)), 0.04977613761684829);
});

test("member ids are stripped as Python's str.strip() strips them", () => {
  assert.equal(stripId("\x1c\x85 m-1\u3000\t"), "m-1");
  assert.equal(stripId("\ufeffm"), "\ufeffm"); // U+FEFF is not whitespace to Python
});

for (const file of files) {
  const golden = JSON.parse(readFileSync(join(GOLDEN, file), "utf8"));
  const plan = new Plan(golden.document);

  test(`${file}: explicit vectors and errors`, () => {
    for (const v of golden.vectors) {
      assert.deepEqual(plan.assign(v.member_id, v.features), v.expect, JSON.stringify(v));
    }
    for (const e of golden.errors) {
      assert.throws(() => plan.assign(e.member_id, e.features), LookupError, e.expect_error);
    }
  });

  test(`${file}: ${golden.members} generated members agree with the server`, () => {
    const cands = candidates(golden.document);
    const bad = [];
    let h = createHash("sha256");
    for (let i = 0; i < golden.members; i++) {
      const [id, feats] = member(golden.document, cands, golden.seed, i);
      if (i < golden.vectors.length) {
        assert.deepEqual([id, feats], [golden.vectors[i].member_id, golden.vectors[i].features]);
      }
      h.update(line(plan.assign(id, feats)));
      if ((i + 1) % golden.chunk === 0 || i + 1 === golden.members) {
        const k = Math.floor(i / golden.chunk);
        if (h.digest("hex") !== golden.chunk_sha256[k]) bad.push(k);
        h = createHash("sha256");
      }
    }
    assert.equal(golden.chunk_sha256.length, Math.ceil(golden.members / golden.chunk));
    assert.deepEqual(bad, [], `chunks with disagreements: ${bad}`);
  });
}
