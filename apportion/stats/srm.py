"""Sample-ratio check: do the arm counts fit the designed split?

A mismatch between the counts and the designed shares signals broken assignment or logging, and
makes every estimate downstream suspect, so a readout that fails it is refused unless overridden.
Pearson's chi-square goodness-of-fit test of the counts against N * shares (Fabijan et al. 2019, "Diagnosing Sample Ratio Mismatch", KDD).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import stats

from apportion.errors import InvalidInput

DEFAULT_THRESHOLD = 0.001  # common practice (from memory: SRM alarms at p < 0.001 or stricter)


@dataclass(frozen=True)
class SampleRatioCheck:
    """Outcome of the check. `flagged` when p_value < threshold, or when any unit sits in an arm
    whose designed share is 0 (then p_value is 0.0 and `statistic` covers the other arms only)."""

    statistic: float
    df: int
    p_value: float
    flagged: bool
    threshold: float
    observed: list[int]
    expected: list[float]

    def to_dict(self) -> dict[str, Any]:
        return {
            "statistic": self.statistic,
            "df": self.df,
            "p_value": self.p_value,
            "flagged": self.flagged,
            "threshold": self.threshold,
            "observed": list(self.observed),
            "expected": list(self.expected),
        }


def sample_ratio_check(
    counts: Any, design_shares: Any, threshold: float = DEFAULT_THRESHOLD
) -> SampleRatioCheck:
    """Pearson chi-square of `counts` (J,) against `design_shares` (J,), df = #{share > 0} - 1.

    With a single arm of positive share there is nothing to test (df = 0, p = 1) unless units
    landed in a zero-share arm.
    """
    observed = np.asarray(counts, dtype=np.float64).ravel()
    shares = np.asarray(design_shares, dtype=np.float64).ravel()
    _validate(observed, shares, threshold)

    total = float(observed.sum())
    expected = total * shares
    positive = shares > 0
    df = int(positive.sum()) - 1
    o, e = observed[positive], expected[positive]
    statistic = float(np.sum((o - e) ** 2 / e))
    stray = bool(np.any(observed[~positive] > 0))
    if stray:
        p_value = 0.0
    elif df == 0:
        p_value = 1.0
    else:
        p_value = float(stats.chi2.sf(statistic, df))
    return SampleRatioCheck(
        statistic=statistic,
        df=df,
        p_value=p_value,
        flagged=stray or p_value < threshold,
        threshold=float(threshold),
        observed=[int(x) for x in observed],
        expected=[float(x) for x in expected],
    )


def _validate(observed: np.ndarray, shares: np.ndarray, threshold: float) -> None:
    if observed.shape != shares.shape:
        raise InvalidInput(
            f"sample-ratio check needs one count per arm: got {observed.size} counts "
            f"for {shares.size} design shares"
        )
    if observed.size == 0:
        raise InvalidInput("sample-ratio check needs at least one arm")
    if not np.all(np.isfinite(observed)) or np.any(observed < 0):
        raise InvalidInput(f"arm counts must be finite and >= 0, got {observed.tolist()}")
    if np.any(observed != np.round(observed)):
        raise InvalidInput(f"arm counts must be whole numbers, got {observed.tolist()}")
    if observed.sum() <= 0:
        raise InvalidInput("sample-ratio check needs at least one unit, all arm counts are 0")
    if not np.all(np.isfinite(shares)) or np.any(shares < 0):
        raise InvalidInput(f"design shares must be finite and >= 0, got {shares.tolist()}")
    if abs(float(shares.sum()) - 1.0) > 1e-6:
        raise InvalidInput(
            f"design shares must sum to 1, got {shares.tolist()} (sum {shares.sum()})"
        )
    if not 0.0 < threshold < 1.0:
        raise InvalidInput(f"sample-ratio threshold must be in (0, 1), got {threshold}")
