"""The in-memory shape of unit-level experiment data, shared by readouts, models, plans and the watch.

Arms are coded 0..J-1 with the control arm always coded 0 (`arm_keys[0]` is the control).
Numeric features are float64 with NaN for missing; categorical features are int32 codes into
`levels` with -1 for missing. Metric columns are float64 ("components"): a mean or proportion
metric has one component (its own column), a ratio metric has two (numerator, denominator).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Literal

import numpy as np

MetricKind = Literal["mean", "proportion", "ratio"]
Direction = Literal["higher", "lower"]
FeatureKind = Literal["numeric", "categorical"]


@dataclass(frozen=True)
class MetricSpec:
    key: str
    kind: MetricKind
    direction: Direction = "higher"
    numerator: str | None = None  # ratio metrics only: column names
    denominator: str | None = None

    @property
    def columns(self) -> tuple[str, ...]:
        """The raw columns (components) this metric is computed from."""
        if self.kind == "ratio":
            assert self.numerator and self.denominator
            return (self.numerator, self.denominator)
        return (self.key,)

    @property
    def ratio_columns(self) -> tuple[str, str]:
        """A ratio metric's (numerator, denominator) columns."""
        if self.numerator is None or self.denominator is None:
            raise ValueError(f"metric '{self.key}' is not a ratio of two columns")
        return self.numerator, self.denominator


@dataclass(frozen=True)
class FeatureSpec:
    key: str
    kind: FeatureKind
    levels: tuple[str, ...] = ()  # categorical: the levels known so far (codes index into this)
    # False: declared as not for personalization; no cohort model splits on it (models.py)
    personalize: bool = True


@dataclass(frozen=True)
class UnitTable:
    """Unit-level rows. All arrays have length n; see the module docstring for codings."""

    unit_ids: np.ndarray  # (n,) object (str)
    arm: np.ndarray  # (n,) int64 codes, 0 = control
    arm_keys: tuple[str, ...]
    design_shares: np.ndarray  # (J,) designed split, sums to 1
    features: tuple[FeatureSpec, ...]
    feature_values: dict[str, np.ndarray]  # key -> float64 (numeric) or int32 codes (categorical)
    metrics: tuple[MetricSpec, ...]
    columns: dict[str, np.ndarray] = field(default_factory=dict)  # component column -> float64

    @property
    def n(self) -> int:
        return int(self.arm.shape[0])

    @property
    def n_arms(self) -> int:
        return len(self.arm_keys)

    def component_names(self) -> tuple[str, ...]:
        """Distinct raw columns of all metrics, in metric order."""
        out: list[str] = []
        for m in self.metrics:
            for c in m.columns:
                if c not in out:
                    out.append(c)
        return tuple(out)

    def component_matrix(self) -> np.ndarray:
        """(n, Q) float64 matrix of the metric components, in `component_names()` order."""
        names = self.component_names()
        return np.column_stack([self.columns[c] for c in names]) if names else np.empty((self.n, 0))

    def metric(self, key: str) -> MetricSpec:
        for m in self.metrics:
            if m.key == key:
                return m
        raise KeyError(key)

    def feature(self, key: str) -> FeatureSpec:
        for f in self.features:
            if f.key == key:
                return f
        raise KeyError(key)

    def take(self, rows: np.ndarray) -> UnitTable:
        """The same table restricted to `rows` (an index or boolean mask)."""
        return UnitTable(
            unit_ids=self.unit_ids[rows],
            arm=self.arm[rows],
            arm_keys=self.arm_keys,
            design_shares=self.design_shares,
            features=self.features,
            feature_values={k: v[rows] for k, v in self.feature_values.items()},
            metrics=self.metrics,
            columns={k: v[rows] for k, v in self.columns.items()},
        )
