"""Salted draws: range, known answers, uniformity, independence of salts and purposes, stability
across processes. Common practice (bins + chisquare, kstest, chi2_contingency; p > 0.001 with fixed ids).

With fixed ids and salts every p-value below is a fixed number, so these tests are deterministic;
for a sound hash each check would fall under 0.001 with probability 0.001 (the threshold is the one
common practice for SRM-style checks).
"""

from __future__ import annotations

import hashlib
import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from apportion.errors import InvalidInput
from apportion.serving.hashing import hash_state, uniforms_from_state
from apportion.serving.index import new_salt, unit_uniform

N = 200_000
ROOT = Path(__file__).resolve().parents[2]


def _ids(n: int = N) -> list[str]:
    # three id styles, common practice: sequential, seeded UUID-like hex, e-mail-like
    rng = np.random.default_rng(11)
    third = n // 3
    seq = [str(i) for i in range(third)]
    hexes = [f"{x:032x}" for x in rng.integers(0, 2**63, size=third)]
    mails = [f"learner{i}@example.org" for i in range(n - 2 * third)]
    return seq + hexes + mails


def _draws(salt: str, purpose: str, ids: list[str]) -> np.ndarray:
    return uniforms_from_state(hash_state(salt, purpose), [i.encode() for i in ids])


def test_known_answer_matches_blake2b_parameter_block():
    # Source: RFC 7693 BLAKE2b as shipped in hashlib; the draw is the digest's top 53 bits / 2**53.
    salt, member = "lesson-length-v1", "member-42"
    param = hashlib.blake2b(salt.encode(), digest_size=16).digest()
    d = hashlib.blake2b(member.encode(), digest_size=8, salt=param, person=b"arm").digest()
    expected = (int.from_bytes(d, "big") >> 11) / 2.0**53
    assert unit_uniform(salt, member, "arm") == expected
    assert unit_uniform(salt, "  member-42 ", "arm") == expected  # ids are stripped
    assert unit_uniform(salt, member, "holdout") != expected


def test_batch_draws_equal_single_draws_bit_for_bit():
    ids = _ids(3000)
    batch = _draws("s1", "arm", ids)
    single = np.array([unit_uniform("s1", i, "arm") for i in ids])
    np.testing.assert_array_equal(batch, single)


def test_draws_in_unit_interval_and_uniform():
    u = _draws("bucket-test", "arm", _ids())
    assert u.min() >= 0.0 and u.max() < 1.0
    # 100 equal bins (expected 2000 >= 5, Cochran), chisquare df = 99
    counts = np.bincount((u * 100).astype(int), minlength=100)
    assert stats.chisquare(counts).pvalue > 0.001
    assert stats.kstest(u, "uniform").pvalue > 0.001


def test_two_salts_are_independent():
    ids = _ids()
    a = (_draws("salt-one", "arm", ids) * 10).astype(int)
    b = (_draws("salt-two", "arm", ids) * 10).astype(int)
    table = np.zeros((10, 10), dtype=int)
    np.add.at(table, (a, b), 1)
    # 10 x 10 cross-tabulation, scipy.stats.chi2_contingency
    assert stats.chi2_contingency(table).pvalue > 0.001
    # and the two purposes under one salt (holdout vs arm) are independent too
    h = (_draws("salt-one", "holdout", ids) * 10).astype(int)
    table2 = np.zeros((10, 10), dtype=int)
    np.add.at(table2, (a, h), 1)
    assert stats.chi2_contingency(table2).pvalue > 0.001


def test_dependence_would_be_detected():
    # The contingency check above can fail: the same salt twice is perfectly dependent.
    ids = _ids(20_000)
    a = (_draws("salt-one", "arm", ids) * 10).astype(int)
    table = np.zeros((10, 10), dtype=int)
    np.add.at(table, (a, a), 1)
    assert stats.chi2_contingency(table).pvalue < 1e-12


_CHILD = """
import sys, json
sys.path.insert(0, {root!r})
from apportion.serving.index import unit_uniform
print(json.dumps([unit_uniform("cross-proc", f"m{{i}}", p) for i in range(50) for p in ("arm", "holdout")]))
"""


def test_same_draws_in_separate_processes():
    # Different PYTHONHASHSEEDs: the draw must not depend on Python's per-process hash().
    outs = []
    for seed in ("1", "987654"):
        r = subprocess.run(
            [sys.executable, "-c", _CHILD.format(root=str(ROOT))],
            capture_output=True,
            text=True,
            check=True,
            env={"PYTHONHASHSEED": seed, "PATH": "/usr/bin:/bin"},
        )
        outs.append(r.stdout)
    here = [unit_uniform("cross-proc", f"m{i}", p) for i in range(50) for p in ("arm", "holdout")]
    assert json.loads(outs[0]) == json.loads(outs[1]) == here


@pytest.mark.parametrize("bad", [12.5, True, None, "", "   ", ["a"]], ids=repr)
def test_bad_member_ids_are_refused(bad):
    with pytest.raises(InvalidInput):
        unit_uniform("s", bad, "arm")


def test_integer_ids_hash_like_their_decimal_string():
    assert unit_uniform("s", 123, "arm") == unit_uniform("s", "123", "arm")
    assert unit_uniform("s", np.int64(123), "arm") == unit_uniform("s", " 123", "arm")


@pytest.mark.parametrize("salt", ["", "x" * 257, None, 5], ids=["empty", "long", "none", "int"])
def test_bad_salts_are_refused(salt):
    with pytest.raises(InvalidInput):
        unit_uniform(salt, "m", "arm")


def test_new_salt_is_random_hex():
    a, b = new_salt(), new_salt()
    assert a != b and len(a) == 32 and int(a, 16) >= 0
