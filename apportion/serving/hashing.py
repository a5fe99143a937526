"""Salted, stable uniform draws per member: the randomisation behind every assignment.

A draw is BLAKE2b (RFC 7693) of the normalised member id, with the plan's salt and the purpose
("holdout", "arm") placed in BLAKE2b's parameter block: `salt` = the 16-byte BLAKE2b digest of
the plan's salt string, `person` = the purpose. Those two fields exist in BLAKE2 for exactly this
(separating hash functions without a key block), so every (salt, purpose) pair is its own hash
function at the cost of one compression per draw. Measured here: 0.20 us per draw, against 0.30 us
for the keyed mode (key=salt costs a second compression) and 0.44 us for sha256 or md5 with a
prefix. Python's `hash()` is salted per process and never used. Common practice (Kohavi and
Longbotham 2007: a good hash of the id; Kohavi et al. 2009: equal chances, consistent repeat
assignment, no correlation between experiments, i.e. between salts).

The first 8 digest bytes give a 64-bit integer; its top 53 bits times 2**-53 give a float in
[0, 1) exactly (dividing all 64 bits by 2**64 could round up to 1.0).

The BLAKE2b configuration and the draw itself live in the dependency-free evaluator
(`apportion.lookup.hash_state`, `apportion.lookup.draw`); this module adds the server's side: the
salt string and its checks, member id normalisation, and the vectorised draws of the batch path.
"""

from __future__ import annotations

import hashlib
import secrets
from collections.abc import Iterable
from functools import lru_cache
from typing import Any

import numpy as np

from apportion import lookup
from apportion.errors import InvalidInput

_SCALE = 2.0**-53
MAX_SALT_BYTES = 256  # a sanity bound; the salt is digested to 16 bytes anyway
MAX_PURPOSE_BYTES = 16  # BLAKE2b personalisation field


def new_salt() -> str:
    """A fresh random salt: 32 hex characters (128 bits)."""
    return secrets.token_hex(16)


def check_salt(salt: Any) -> bytes:
    """The salt as bytes; InvalidInput unless a non-empty string of at most 256 UTF-8 bytes."""
    if not isinstance(salt, str) or not salt:
        raise InvalidInput(f"salt must be a non-empty string, got {salt!r}")
    key = salt.encode("utf-8")
    if len(key) > MAX_SALT_BYTES:
        raise InvalidInput(f"salt is {len(key)} bytes long; at most {MAX_SALT_BYTES} are allowed")
    return key


@lru_cache(maxsize=256)
def hash_state(salt: str, purpose: str) -> Any:
    """An empty BLAKE2b state for (salt, purpose); callers `.copy()` it and add the id."""
    param_salt = hashlib.blake2b(check_salt(salt), digest_size=16).digest()
    person = purpose.encode("utf-8")
    if not person or len(person) > MAX_PURPOSE_BYTES:
        raise InvalidInput(f"purpose must be 1 to {MAX_PURPOSE_BYTES} bytes long, got {purpose!r}")
    return lookup.hash_state(param_salt, purpose)


def normalise_member_id(member_id: Any) -> str:
    """The id as a stripped string; an integer id hashes like its decimal string.

    Floats, bools and other types are refused: `12.0` and `12` would otherwise be different
    members, and the unit of randomisation must be unambiguous (normalise before hashing).
    """
    if isinstance(member_id, str):
        out = member_id.strip()
    elif isinstance(member_id, int | np.integer) and not isinstance(member_id, bool | np.bool_):
        out = str(int(member_id))
    else:
        raise InvalidInput(
            f"member_id must be a string or an integer, got {type(member_id).__name__} {member_id!r}",
            errors=[{"field": "member_id", "got": type(member_id).__name__}],
        )
    if not out:
        raise InvalidInput(
            f"member_id must not be empty, got {member_id!r}",
            errors=[{"field": "member_id", "got": repr(member_id)}],
        )
    return out


def unit_uniform(salt: str, member_id: str, purpose: str) -> float:
    """A draw in [0, 1) fixed by (salt, normalised member id, purpose)."""
    return lookup.draw(hash_state(salt, purpose), normalise_member_id(member_id).encode("utf-8"))


uniform_from_state = lookup.draw  # the draw for an already normalised, encoded id


def uniforms_from_state(state: Any, members: Iterable[bytes]) -> np.ndarray:
    """(n,) float64 draws for encoded ids; equal bit for bit to `uniform_from_state` per id.

    One comprehension with the state's `copy` prebound: per id one copy, one update, one digest
    and no other Python call (`update` returns None, so `or` moves on to the digest)."""
    copy = state.copy
    raw = np.frombuffer(b"".join([(h := copy()).update(m) or h.digest() for m in members]), ">u8")
    return (raw >> np.uint64(11)).astype(np.float64) * _SCALE
