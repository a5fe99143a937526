// Assign members from a portable compiled plan, exactly as the Apportion server does.
// An ES module with no dependencies beyond Node's own (it uses none at all: BLAKE2b is written
// out below from RFC 7693, because Node's crypto offers BLAKE2b only without the salt and
// personalisation parameters and with a fixed 64-byte digest). Runs in browsers too.
//
// The document comes from `GET /v1/plans/{plan}/compiled`; its format is specified in
// docs/compiled-plan.md. Usage:
//
//   import { Plan } from "./apportion-lookup.mjs";
//   const plan = Plan.fromJSON(text);
//   const answer = plan.assign("member-17", { tenure_days: 12, level: "beginner" });
//   // { arm, cohort, plan_version, holdout, defaults_used }
//
// Checked against the server's golden vectors by js/test/lookup.test.mjs (node --test).

export const FORMAT = "apportion-compiled-plan";
export const FORMAT_VERSION = 1;

export class LookupError extends Error {}

// ---- BLAKE2b (RFC 7693), 64-bit words as pairs of 32-bit halves (low at even index) ----------
const IV = new Uint32Array([
  0xf3bcc908, 0x6a09e667, 0x84caa73b, 0xbb67ae85, 0xfe94f82b, 0x3c6ef372, 0x5f1d36f1, 0xa54ff53a,
  0xade682d1, 0x510e527f, 0x2b3e6c1f, 0x9b05688c, 0xfb41bd6b, 0x1f83d9ab, 0x137e2179, 0x5be0cd19,
]);
const SIGMA = [
  [0, 1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 11, 12, 13, 14, 15],
  [14, 10, 4, 8, 9, 15, 13, 6, 1, 12, 0, 2, 11, 7, 5, 3],
  [11, 8, 12, 0, 5, 2, 15, 13, 10, 14, 3, 6, 7, 1, 9, 4],
  [7, 9, 3, 1, 13, 12, 11, 14, 2, 6, 5, 10, 4, 0, 15, 8],
  [9, 0, 5, 7, 2, 4, 10, 15, 14, 1, 11, 12, 6, 8, 3, 13],
  [2, 12, 6, 10, 0, 11, 8, 3, 4, 13, 7, 5, 15, 14, 1, 9],
  [12, 5, 1, 15, 14, 13, 4, 10, 0, 7, 6, 3, 9, 2, 8, 11],
  [13, 11, 7, 14, 12, 1, 3, 9, 5, 0, 15, 4, 8, 6, 2, 10],
  [6, 15, 14, 9, 11, 3, 0, 8, 12, 2, 13, 7, 1, 4, 10, 5],
  [10, 2, 8, 4, 7, 6, 1, 5, 15, 11, 9, 14, 3, 12, 13, 0],
  [0, 1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 11, 12, 13, 14, 15],
  [14, 10, 4, 8, 9, 15, 13, 6, 1, 12, 0, 2, 11, 7, 5, 3],
].map((row) => row.map((i) => 2 * i));

const v = new Uint32Array(32);
const m = new Uint32Array(32);

function add(a, b) { // v[a] += v[b] (64-bit)
  const lo = v[a] + v[b];
  v[a + 1] = v[a + 1] + v[b + 1] + (lo >= 0x100000000 ? 1 : 0);
  v[a] = lo;
}

function addm(a, i) { // v[a] += m[i] (64-bit)
  const lo = v[a] + m[i];
  v[a + 1] = v[a + 1] + m[i + 1] + (lo >= 0x100000000 ? 1 : 0);
  v[a] = lo;
}

function g(a, b, c, d, x, y) {
  add(a, b); addm(a, x);
  let lo = v[d] ^ v[a], hi = v[d + 1] ^ v[a + 1]; // d = rotr64(d ^ a, 32)
  v[d] = hi; v[d + 1] = lo;
  add(c, d);
  lo = v[b] ^ v[c]; hi = v[b + 1] ^ v[c + 1]; // b = rotr64(b ^ c, 24)
  v[b] = (lo >>> 24) | (hi << 8); v[b + 1] = (hi >>> 24) | (lo << 8);
  add(a, b); addm(a, y);
  lo = v[d] ^ v[a]; hi = v[d + 1] ^ v[a + 1]; // d = rotr64(d ^ a, 16)
  v[d] = (lo >>> 16) | (hi << 16); v[d + 1] = (hi >>> 16) | (lo << 16);
  add(c, d);
  lo = v[b] ^ v[c]; hi = v[b + 1] ^ v[c + 1]; // b = rotr64(b ^ c, 63)
  v[b] = (lo << 1) | (hi >>> 31); v[b + 1] = (hi << 1) | (lo >>> 31);
}

function compress(h, block, t, last) {
  for (let i = 0; i < 16; i++) { v[i] = h[i]; v[i + 16] = IV[i]; }
  v[24] ^= t; // t < 2**32: the id is at most a few hundred bytes
  if (last) { v[28] = ~v[28]; v[29] = ~v[29]; }
  for (let i = 0; i < 32; i++) {
    const o = 4 * i;
    m[i] = block[o] | (block[o + 1] << 8) | (block[o + 2] << 16) | (block[o + 3] << 24);
  }
  for (let r = 0; r < 12; r++) {
    const s = SIGMA[r];
    g(0, 8, 16, 24, s[0], s[1]);
    g(2, 10, 18, 26, s[2], s[3]);
    g(4, 12, 20, 28, s[4], s[5]);
    g(6, 14, 22, 30, s[6], s[7]);
    g(0, 10, 20, 30, s[8], s[9]);
    g(2, 12, 22, 24, s[10], s[11]);
    g(4, 14, 16, 26, s[12], s[13]);
    g(6, 8, 18, 28, s[14], s[15]);
  }
  for (let i = 0; i < 16; i++) h[i] ^= v[i] ^ v[i + 16];
}

function le32(bytes, o) {
  return (bytes[o] | (bytes[o + 1] << 8) | (bytes[o + 2] << 16) | (bytes[o + 3] << 24)) >>> 0;
}

// The initial state of BLAKE2b with an 8-byte digest, no key, a 16-byte salt and a 16-byte
// personalisation (zero-padded), from the parameter block of RFC 7693 section 2.5.
function initialState(salt16, person) {
  const p = new Uint8Array(64);
  p[0] = 8; p[2] = 1; p[3] = 1; // digest length, fanout, depth
  p.set(salt16, 32);
  p.set(person.subarray(0, 16), 48);
  const h = new Uint32Array(16);
  for (let i = 0; i < 16; i++) h[i] = IV[i] ^ le32(p, 4 * i);
  return h;
}

const block = new Uint8Array(128);
const hwork = new Uint32Array(16);

// The draw in [0, 1): the top 53 bits of the big-endian first 8 digest bytes, times 2**-53.
function draw(state, bytes) {
  hwork.set(state);
  let off = 0;
  const n = bytes.length;
  while (n - off > 128) {
    block.set(bytes.subarray(off, off + 128));
    off += 128;
    compress(hwork, block, off, false);
  }
  block.fill(0);
  block.set(bytes.subarray(off));
  compress(hwork, block, n, true);
  const lo = hwork[0], hi = hwork[1]; // digest bytes 0..3 are lo little-endian, 4..7 hi
  const b0 = (lo & 0xff) * 0x1000000 + ((lo >>> 8) & 0xff) * 0x10000 + ((lo >>> 16) & 0xff) * 0x100 + (lo >>> 24);
  const b1 = (hi & 0xff) * 0x1000000 + ((hi >>> 8) & 0xff) * 0x10000 + ((hi >>> 16) & 0xff) * 0x100 + (hi >>> 24);
  return (b0 * 2097152 + Math.floor(b1 / 2048)) * 2 ** -53;
}

export function blake2bDraw(saltHex, person, text) { // exported for the tests
  return draw(initialState(hexBytes(saltHex), utf8(person)), utf8(text));
}

// ---- member ids ---------------------------------------------------------------------------------
// Exactly the characters Python's str.strip() removes (String.prototype.trim differs: it keeps
// U+001C..U+001F and U+0085 and removes U+FEFF).
const WS = new Set([
  0x09, 0x0a, 0x0b, 0x0c, 0x0d, 0x1c, 0x1d, 0x1e, 0x1f, 0x20, 0x85, 0xa0, 0x1680,
  0x2000, 0x2001, 0x2002, 0x2003, 0x2004, 0x2005, 0x2006, 0x2007, 0x2008, 0x2009, 0x200a,
  0x2028, 0x2029, 0x202f, 0x205f, 0x3000,
]);

export function stripId(s) {
  let a = 0, b = s.length;
  while (a < b && WS.has(s.charCodeAt(a))) a++;
  while (b > a && WS.has(s.charCodeAt(b - 1))) b--;
  return s.slice(a, b);
}

const encoder = new TextEncoder();
function utf8(s) { return encoder.encode(s); }

function hexBytes(hex) {
  const out = new Uint8Array(hex.length / 2);
  for (let i = 0; i < out.length; i++) out[i] = parseInt(hex.slice(2 * i, 2 * i + 2), 16);
  return out;
}

function hasLoneSurrogate(s) {
  for (let i = 0; i < s.length; i++) {
    const c = s.charCodeAt(i);
    if (c >= 0xd800 && c <= 0xdbff) {
      const d = s.charCodeAt(i + 1);
      if (!(d >= 0xdc00 && d <= 0xdfff)) return true;
      i++;
    } else if (c >= 0xdc00 && c <= 0xdfff) return true;
  }
  return false;
}

// ---- the plan -----------------------------------------------------------------------------------
export class Plan {
  constructor(doc) {
    if (doc.format !== FORMAT) throw new LookupError(`not a compiled plan document: format is ${doc.format}`);
    if (doc.format_version !== FORMAT_VERSION) {
      throw new LookupError(`format_version ${doc.format_version} is not supported (this module reads ${FORMAT_VERSION})`);
    }
    const h = doc.hashing;
    if (h.function !== "blake2b" || h.digest_bytes !== 8) throw new LookupError("unsupported hashing");
    const salt = hexBytes(h.salt_hex);
    this.plan = doc.plan;
    this.version = doc.plan_version;
    this.contentHash = doc.content_hash;
    this.arms = doc.arms.slice();
    this.holdoutShare = doc.holdout.share;
    this.holdoutArm = doc.holdout.arm;
    this.holdoutState = initialState(salt, utf8(h.person.holdout));
    this.armState = initialState(salt, utf8(h.person.arm));
    this.features = doc.features.map((f) => ({ key: f.key, numeric: f.kind === "numeric" }));
    this.cumulative = doc.cumulative.map((row) => Float64Array.from(row));
    this.nodes = doc.nodes.map((nd) => {
      if ("cohort" in nd) return { leaf: true, cohort: nd.cohort };
      const f = this.features[nd.feature];
      const out = { leaf: false, feature: nd.feature, key: f.key, numeric: f.numeric, left: nd.left, right: nd.right, defaultLeft: nd.default === "left" };
      if (f.numeric) out.threshold = nd.threshold;
      else {
        out.levels = new Map();
        for (const lv of nd.right_levels) out.levels.set(lv, false);
        for (const lv of nd.left_levels) out.levels.set(lv, true); // left wins
      }
      return out;
    });
  }

  static fromJSON(text) { return new Plan(JSON.parse(text)); }

  // The answer for one member: { arm, cohort, plan_version, holdout, defaults_used }.
  // Throws LookupError where the server answers 422 (empty id, wrongly typed feature value).
  assign(memberId, features = {}) {
    let member;
    if (typeof memberId === "string") member = stripId(memberId);
    else if (typeof memberId === "number" && Number.isSafeInteger(memberId)) member = String(memberId);
    else throw new LookupError(`member_id must be a string, got ${typeof memberId}`);
    if (member === "") throw new LookupError("member_id must not be empty");
    if (hasLoneSurrogate(member)) throw new LookupError("member_id has a lone surrogate");
    const feats = features ?? {};
    for (const f of this.features) {
      const x = Object.hasOwn(feats, f.key) ? feats[f.key] : null;
      if (x === null || x === undefined) continue;
      if (f.numeric ? typeof x !== "number" : typeof x !== "string" && !(typeof x === "number" && Number.isNaN(x))) {
        throw new LookupError(`feature '${f.key}' must be ${f.numeric ? "a number" : "a string level"}, got ${typeof x}`);
      }
    }
    let node = this.nodes[0];
    const used = new Set();
    while (!node.leaf) {
      const x = Object.hasOwn(feats, node.key) ? feats[node.key] : null;
      let side;
      if (node.numeric) side = x === null || x === undefined || Number.isNaN(x) ? undefined : x < node.threshold;
      else side = typeof x === "string" ? node.levels.get(x) : undefined;
      if (side === undefined) {
        side = node.defaultLeft;
        used.add(node.feature);
      }
      node = this.nodes[side ? node.left : node.right];
    }
    const cohort = node.cohort;
    const defaults = [...used].sort((a, b) => a - b).map((i) => this.features[i].key);
    const bytes = utf8(member);
    if (this.holdoutShare > 0 && draw(this.holdoutState, bytes) < this.holdoutShare) {
      return { arm: this.holdoutArm, cohort, plan_version: this.version, holdout: true, defaults_used: defaults };
    }
    const u = draw(this.armState, bytes);
    const cum = this.cumulative[cohort];
    let j = 0;
    while (j < cum.length - 1 && cum[j] <= u) j++; // the first j with cum[j] > u (cum ends at 1)
    return { arm: this.arms[j], cohort, plan_version: this.version, holdout: false, defaults_used: defaults };
  }
}
