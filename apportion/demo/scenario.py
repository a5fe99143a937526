"""The invented demo scenario: a simulator of a four-arm lesson-length test.

Every number is invented. The module draws learners (features), assigns arms (the designed 25 %
split, or codes given by the caller for post-launch streams) and draws the metric components from
the scenario's true effect functions, which it also exposes (`true_component_means`, `true_lifts`,
`oracle_plan`) so tests and the demo can compare a fitted plan with the truth.

Random streams: one `np.random.SeedSequence(seed)` is spawned into independent children for the
features, the arm draw and the outcomes, so `simulate(n, seed, arm=a)` sees exactly the learners of
`simulate_features(n, seed)` whatever `a` is.

Longer than most modules (about 470 lines) on purpose: the invented truth (features, effect
functions, noise model) and the simulator that draws from it must be read together to check
that the demo's report compares the plan with the very truth the data came from.
"""

from __future__ import annotations

import io
from collections.abc import Callable
from typing import Any

import numpy as np

from apportion.errors import InvalidInput
from apportion.stats.table import FeatureSpec, MetricSpec, UnitTable

EXPERIMENT_KEY = "lesson-length"
ARMS = ("five_min", "ten_min", "fifteen_min", "adaptive")  # five_min (code 0) is the control
DESIGN_SHARES = np.full(len(ARMS), 0.25)
SUCCESS = "active_days"

LEVELS = ("beginner", "intermediate", "advanced")
DEVICES = ("phone", "tablet", "web")
AGE_BANDS = ("18-24", "25-34", "35-54", "55+")
REGIONS = ("north", "south", "east", "west")

FEATURES: tuple[FeatureSpec, ...] = (
    FeatureSpec("tenure_days", "numeric"),
    FeatureSpec("level", "categorical", LEVELS),
    FeatureSpec("device", "categorical", DEVICES),
    FeatureSpec("streak_days", "numeric"),
    FeatureSpec("daily_goal_min", "numeric"),
    FeatureSpec("age_band", "categorical", AGE_BANDS),
    FeatureSpec("region", "categorical", REGIONS),
    FeatureSpec("noise_1", "numeric"),
    FeatureSpec("noise_2", "numeric"),
    FeatureSpec("noise_3", "numeric"),
)

METRICS: tuple[MetricSpec, ...] = (
    MetricSpec("active_days", "mean", "higher"),
    MetricSpec("abandon_rate", "ratio", "lower", "lessons_abandoned", "lessons_started"),
    MetricSpec("cancelled", "proportion", "lower"),
    MetricSpec("support_contacts", "mean", "lower"),
)
COMPONENTS = (
    "active_days",
    "lessons_abandoned",
    "lessons_started",
    "cancelled",
    "support_contacts",
)

# Confidence 0.8 per guardrail (the scenario leaves it to us). With 200,000 learners and the honest
# half for estimation, the sd of switching everyone is about 3.2 % of the support baseline, so a
# 95 % plan spends z * sd = 5.2 % of a 5 % allowance on noise alone and keeps most learners on
# control; at 0.8 the chance plan still broke no true guardrail in 10 of 10 seeds (measured with
# tests/optimize/test_scenario.py; 0.95 reached 80 % of the oracle in 3 of 10 seeds, 0.8 in 9).
GUARDRAILS: list[dict[str, Any]] = [
    {"metric": "abandon_rate", "threshold": 0.01, "unit": "absolute", "confidence": 0.8},
    {"metric": "cancelled", "threshold": 0.003, "unit": "absolute", "confidence": 0.8},
    {"metric": "support_contacts", "threshold": 5, "unit": "relative", "confidence": 0.8},
]

# Missing values: a small share of the two effect-free features is blanked in the observed data so
# the pipeline sees missing numeric and categorical values without the truth depending on them.
MISSING_SHARE = 0.01
_MISSABLE = ("daily_goal_min", "region")

# Base levels under control (invented; chosen so the population levels come out as the docstring says).
_ACTIVE_BASE = 2.16  # days/week before the streak and tenure terms; population mean ~3.0
_ABANDON_BASE = np.array([0.14, 0.11, 0.09])  # by level; lessons-weighted population ~12 %
_CANCEL_BASE, _CANCEL_NEW = 0.034, 0.025  # + _CANCEL_NEW when tenure_days < 30; population ~4 %
_SUPPORT_BASE, _SUPPORT_OLDEST = 0.075, 0.05  # + _SUPPORT_OLDEST for age_band 55+; ~0.08

# A harm hook returns additive shifts of the per-unit parameters, keyed by metric: active_days in
# expected days, abandon_rate in abandon probability, cancelled in probability, support_contacts in
# expected contacts. Shape (n,) each; keys may be omitted.
Harm = Callable[[dict[str, np.ndarray], np.ndarray], dict[str, np.ndarray]]
_HARM_KEYS = frozenset(m.key for m in METRICS)


def experiment_declaration() -> dict[str, Any]:
    """JSON body for POST /v1/experiments declaring the scenario's arms, metrics and features."""
    return {
        "key": EXPERIMENT_KEY,
        "name": "Lesson length",
        "arms": [{"key": a, "share": float(s)} for a, s in zip(ARMS, DESIGN_SHARES, strict=True)],
        "control": ARMS[0],
        "metrics": [
            {
                "key": m.key,
                "kind": m.kind,
                "direction": m.direction,
                "numerator": m.numerator,
                "denominator": m.denominator,
            }
            for m in METRICS
        ],
        "features": [
            {"key": f.key, "kind": f.kind, **({"levels": list(f.levels)} if f.levels else {})}
            for f in FEATURES
        ],
    }


def _streams(seed: int) -> tuple[np.random.Generator, np.random.Generator, np.random.Generator]:
    feat, arm, out = np.random.SeedSequence(seed).spawn(3)
    return np.random.default_rng(feat), np.random.default_rng(arm), np.random.default_rng(out)


def _unit_ids(n: int) -> np.ndarray:
    width = max(7, len(str(n)))
    return np.array([f"u{i:0{width}d}" for i in range(1, n + 1)], dtype=object)


def _categorical(rng: np.random.Generator, n: int, probs: list[float]) -> np.ndarray:
    return rng.choice(len(probs), size=n, p=probs).astype(np.int32)


def _draw_features(rng: np.random.Generator, n: int, missing_share: float) -> dict[str, np.ndarray]:
    fv: dict[str, np.ndarray] = {}
    fv["tenure_days"] = np.minimum(np.floor(rng.lognormal(np.log(60.0), 1.0, n)), 1500.0)
    fv["level"] = _categorical(rng, n, [0.50, 0.35, 0.15])
    fv["device"] = _categorical(rng, n, [0.60, 0.15, 0.25])
    fv["streak_days"] = (rng.geometric(1.0 / 7.0, n) - 1).astype(np.float64)  # {0,1,..}, mean 6
    fv["daily_goal_min"] = rng.choice([5.0, 10.0, 15.0, 20.0], size=n, p=[0.35, 0.35, 0.20, 0.10])
    fv["age_band"] = _categorical(rng, n, [0.30, 0.35, 0.25, 0.10])
    fv["region"] = _categorical(rng, n, [0.25] * 4)
    for k in ("noise_1", "noise_2", "noise_3"):
        fv[k] = rng.uniform(0.0, 1.0, n)
    if missing_share > 0:
        for k in _MISSABLE:
            blank = rng.random(n) < missing_share
            fv[k] = fv[k].copy()
            fv[k][blank] = -1 if fv[k].dtype == np.int32 else np.nan
    return fv


def simulate_features(
    n: int, seed: int = 0, *, missing_share: float = MISSING_SHARE
) -> tuple[np.ndarray, dict[str, np.ndarray]]:
    """Learners only: (unit_ids (n,) object, feature key -> (n,) float64 or int32 codes)."""
    if n < 1:
        raise InvalidInput(f"n must be at least 1, got {n}")
    rng, _, _ = _streams(seed)
    return _unit_ids(n), _draw_features(rng, n, missing_share)


def _unit_params(
    fv: dict[str, np.ndarray], arm: np.ndarray, harm: Harm | None = None
) -> dict[str, np.ndarray]:
    """Per-unit outcome parameters under the given arm codes (n,): expected active days, abandon
    probability, cancel probability and expected support contacts (the scenario's true effects)."""
    level, device = fv["level"], fv["device"]
    streak, tenure = fv["streak_days"], fv["tenure_days"]
    beginner, advanced = level == 0, level == 2
    phone, tablet, web = device == 0, device == 1, device == 2
    new = tenure < 30
    ten, fifteen, adaptive = arm == 1, arm == 2, arm == 3

    base_days = _ACTIVE_BASE + 0.15 * np.minimum(streak, 14.0) + 0.3 * (tenure >= 180)
    d_days = np.where(ten, np.where(~beginner, 0.25, np.where(phone, -0.10, 0.0)), 0.0)
    d_days = d_days + np.where(
        fifteen, np.where(advanced & (streak >= 7), 0.50, np.where(beginner, -0.30, 0.05)), 0.0
    )
    d_days = d_days + np.where(adaptive, np.where(tablet, 0.30, 0.15), 0.0)

    d_aband = np.where(ten, np.where(beginner, 0.015, 0.003), 0.0)
    d_aband = d_aband + np.where(fifteen, np.where(phone, 0.04, 0.01), 0.0)
    d_aband = d_aband + np.where(adaptive, 0.015, 0.0)

    cancel = _CANCEL_BASE + _CANCEL_NEW * new + np.where(fifteen & new, 0.005, 0.0)
    support = (_SUPPORT_BASE + _SUPPORT_OLDEST * (fv["age_band"] == 3)) * np.where(
        adaptive & web, 1.10, 1.0
    )
    params = {
        "active_days": base_days + d_days,
        "abandon_rate": _ABANDON_BASE[level] + d_aband,
        "cancelled": cancel,
        "support_contacts": support,
    }
    if harm is not None:
        shifts = harm(fv, arm)
        unknown = set(shifts) - _HARM_KEYS
        if unknown:
            raise InvalidInput(
                f"harm shifts unknown keys {sorted(unknown)}; known {sorted(_HARM_KEYS)}"
            )
        for k, s in shifts.items():
            params[k] = params[k] + np.asarray(s, dtype=np.float64)
    params["active_days"] = np.clip(params["active_days"], 0.0, 7.0)
    params["abandon_rate"] = np.clip(params["abandon_rate"], 0.0, 1.0)
    params["cancelled"] = np.clip(params["cancelled"], 0.0, 1.0)
    params["support_contacts"] = np.maximum(params["support_contacts"], 0.0)
    return params


def simulate(
    n: int,
    seed: int = 0,
    *,
    arm: np.ndarray | None = None,
    harm: Harm | None = None,
    missing_share: float = MISSING_SHARE,
) -> UnitTable:
    """A UnitTable of n simulated learners: the designed 25 % split unless `arm` (n,) codes are
    given; metric components drawn from the noise model above."""
    unit_ids, fv = simulate_features(n, seed, missing_share=missing_share)
    _, arm_rng, out = _streams(seed)
    if arm is None:
        codes = arm_rng.choice(len(ARMS), size=n, p=DESIGN_SHARES).astype(np.int64)
    else:
        codes = np.asarray(arm, dtype=np.int64)
        if codes.shape != (n,) or codes.min() < 0 or codes.max() >= len(ARMS):
            raise InvalidInput(
                f"arm must be {n} codes in 0..{len(ARMS) - 1}, got shape {codes.shape}"
                f" with range [{codes.min()}, {codes.max()}]"
            )
    p = _unit_params(fv, codes, harm)
    active = out.binomial(7, p["active_days"] / 7.0)
    started = out.poisson(5.0 * active / 3.0 + 1.0)
    abandoned = out.binomial(started, p["abandon_rate"])
    cancelled = (out.random(n) < p["cancelled"]).astype(np.float64)
    support = out.poisson(p["support_contacts"])
    return UnitTable(
        unit_ids=unit_ids,
        arm=codes,
        arm_keys=ARMS,
        design_shares=DESIGN_SHARES.copy(),
        features=FEATURES,
        feature_values=fv,
        metrics=METRICS,
        columns={
            "active_days": active.astype(np.float64),
            "lessons_abandoned": abandoned.astype(np.float64),
            "lessons_started": started.astype(np.float64),
            "cancelled": cancelled,
            "support_contacts": support.astype(np.float64),
        },
    )


def true_component_means(
    feature_values: dict[str, np.ndarray], *, harm: Harm | None = None
) -> np.ndarray:
    """(n, J, Q) expected value of each component column (COMPONENTS order, which is
    UnitTable.component_names() order) for each unit under each arm."""
    n = feature_values["level"].shape[0]
    out = np.empty((n, len(ARMS), len(COMPONENTS)))
    for j in range(len(ARMS)):
        p = _unit_params(feature_values, np.full(n, j, dtype=np.int64), harm)
        # E[started] = 5 E[active]/3 + 1; abandonment is Binomial(started, a) so E = a E[started].
        started = 5.0 * p["active_days"] / 3.0 + 1.0
        out[:, j] = np.column_stack(
            [
                p["active_days"],
                p["abandon_rate"] * started,
                started,
                p["cancelled"],
                p["support_contacts"],
            ]
        )
    return out


def _metric_values_from(totals: np.ndarray) -> dict[str, float]:
    """Metric values from population component totals (..., Q), summed over units."""
    pos = {c: i for i, c in enumerate(COMPONENTS)}
    out: dict[str, Any] = {}
    for m in METRICS:
        if m.kind == "ratio":
            out[m.key] = totals[..., pos[m.ratio_columns[0]]] / totals[..., pos[m.ratio_columns[1]]]
        else:
            out[m.key] = totals[..., pos[m.key]]
    return out


def true_metric_values(
    feature_values: dict[str, np.ndarray],
    allocation_probs: np.ndarray,
    *,
    harm: Harm | None = None,
) -> dict[str, float]:
    """Population value of each metric when unit i gets arm j with prob allocation_probs[i, j]
    (n, J): the mean for mean/proportion metrics, sum E[num] / sum E[den] for ratios."""
    mu = true_component_means(feature_values, harm=harm)
    probs = np.asarray(allocation_probs, dtype=np.float64)
    if probs.shape != mu.shape[:2]:
        raise InvalidInput(f"allocation_probs must have shape {mu.shape[:2]}, got {probs.shape}")
    totals = np.einsum("nj,njq->q", probs, mu) / mu.shape[0]
    return {k: float(v) for k, v in _metric_values_from(totals).items()}


def true_lifts(
    feature_values: dict[str, np.ndarray],
    allocation_probs: np.ndarray,
    baseline_probs: np.ndarray | None = None,
    *,
    harm: Harm | None = None,
) -> dict[str, float]:
    """Absolute change of each metric's population value against `baseline_probs` (default: every
    unit on the control arm). Relative change = lift / true_metric_values(baseline)."""
    n = feature_values["level"].shape[0]
    if baseline_probs is None:
        baseline_probs = np.zeros((n, len(ARMS)))
        baseline_probs[:, 0] = 1.0
    plan = true_metric_values(feature_values, allocation_probs, harm=harm)
    base = true_metric_values(feature_values, baseline_probs, harm=harm)
    return {k: plan[k] - base[k] for k in plan}


def guardrail_limits(baseline: dict[str, float]) -> dict[str, float]:
    """Each guardrail's allowed absolute change given the baseline metric values (relative
    thresholds are per cent of the baseline)."""
    return {
        g["metric"]: g["threshold"]
        * (baseline[g["metric"]] / 100.0 if g["unit"] == "relative" else 1.0)
        for g in GUARDRAILS
    }


# --------------------------------------------------------------------------- the oracle
COHORT_FEATURES = ("level", "device", "streak_days>=7", "tenure_days<30")
N_COHORTS = len(LEVELS) * len(DEVICES) * 2 * 2


def cohort_of(feature_values: dict[str, np.ndarray]) -> np.ndarray:
    """The scenario's fine cohort (n,) int64 in 0..35: level x device x streak>=7 x tenure<30,
    the features the true effects depend on."""
    level = feature_values["level"].astype(np.int64)
    device = feature_values["device"].astype(np.int64)
    streak = (feature_values["streak_days"] >= 7).astype(np.int64)
    new = (feature_values["tenure_days"] < 30).astype(np.int64)
    return ((level * len(DEVICES) + device) * 2 + streak) * 2 + new


def cohort_labels() -> list[str]:
    """Readable label of each fine cohort, in code order."""
    return [
        f"{lv}, {dv}, streak {'>=7' if s else '<7'}, tenure {'<30' if t else '>=30'}"
        for lv in LEVELS
        for dv in DEVICES
        for s in (0, 1)
        for t in (0, 1)
    ]


def oracle_plan(feature_values: dict[str, np.ndarray]) -> dict[str, Any]:
    """The guardrail-aware optimum on the true effects over the fine cohorts, by a small LP
    (scipy.optimize.linprog, HiGHS), plus every single arm's true lifts and the best single arm
    that meets the true guardrails.

    LP: maximise sum_cj x_cj A_cj (A_cj = population total of expected active days of cohort c under
    arm j, divided by n) s.t. each row of x on the simplex and, per guardrail, the change against
    all-control within its limit; the ratio guardrail R(x) <= R0 + t is linear as
    N(x) - (R0 + t) D(x) <= 0 with N, D the totals of numerator and denominator.
    """
    from scipy.optimize import linprog

    mu = true_component_means(feature_values)  # (n, J, Q)
    n, n_arms, q = mu.shape
    cohort = cohort_of(feature_values)
    totals = np.zeros((N_COHORTS, n_arms, q))
    np.add.at(totals, cohort, mu / n)  # (C, J, Q): each cohort's contribution to population means
    pos = {c: i for i, c in enumerate(COMPONENTS)}
    base = {k: float(v) for k, v in _metric_values_from(totals[:, 0].sum(axis=0)).items()}
    limits = guardrail_limits(base)

    a_ub, b_ub = [], []
    for g in GUARDRAILS:
        m = next(mm for mm in METRICS if mm.key == g["metric"])
        if m.kind == "ratio":
            num, den = totals[..., pos[m.ratio_columns[0]]], totals[..., pos[m.ratio_columns[1]]]
            a_ub.append((num - (base[m.key] + limits[m.key]) * den).ravel())
            b_ub.append(0.0)
        else:
            a_ub.append(totals[..., pos[m.key]].ravel())
            b_ub.append(base[m.key] + limits[m.key])
    a_eq = np.kron(np.eye(N_COHORTS), np.ones(n_arms))
    res = linprog(
        -totals[..., pos[SUCCESS]].ravel(),
        A_ub=np.array(a_ub),
        b_ub=np.array(b_ub),
        A_eq=a_eq,
        b_eq=np.ones(N_COHORTS),
        bounds=(0.0, 1.0),
        method="highs",
    )
    if not res.success:  # all-control is always feasible, so this is a solver failure
        raise RuntimeError(f"oracle LP failed: {res.message}")
    alloc = np.clip(res.x.reshape(N_COHORTS, n_arms), 0.0, 1.0)
    alloc /= alloc.sum(axis=1, keepdims=True)
    empty = np.bincount(cohort, minlength=N_COHORTS) == 0
    alloc[empty] = np.eye(n_arms)[0]

    def lifts_of(x: np.ndarray) -> dict[str, float]:
        vals = _metric_values_from(np.einsum("cj,cjq->q", x, totals))
        return {k: float(vals[k]) - base[k] for k in vals}

    def meets(lifts: dict[str, float]) -> bool:
        return all(lifts[k] <= lim + 1e-12 for k, lim in limits.items())

    single = {a: lifts_of(np.tile(np.eye(n_arms)[j], (N_COHORTS, 1))) for j, a in enumerate(ARMS)}
    safe = [a for a in ARMS if meets(single[a])]
    best = max(safe, key=lambda a: single[a][SUCCESS])
    return {
        "cohort_of": cohort_of,
        "cohort": cohort,
        "cohort_labels": cohort_labels(),
        "allocation": alloc,
        "lifts": lifts_of(alloc),
        "baseline": base,
        "limits": limits,
        "single_arm_lifts": single,
        "best_single_arm": best,
        "best_single_lifts": single[best],
    }


# --------------------------------------------------------------------------- upload format
def to_csv_bytes(table: UnitTable) -> bytes:
    """The readout upload format: header unit_id, arm (arm key), the feature columns (categoricals
    as level strings, missing empty) and the metric component columns; integer-valued numeric
    columns are written without a decimal point."""
    import pyarrow as pa
    import pyarrow.csv as pacsv

    cols: dict[str, Any] = {
        "unit_id": pa.array(table.unit_ids.astype(str)),
        "arm": pa.DictionaryArray.from_arrays(
            pa.array(table.arm.astype(np.int32)), pa.array(list(table.arm_keys))
        ).cast(pa.string()),
    }
    for f in table.features:
        v = table.feature_values[f.key]
        if f.kind == "categorical":
            codes = v.astype(np.int32)
            cols[f.key] = pa.DictionaryArray.from_arrays(
                pa.array(codes, mask=codes < 0), pa.array(list(f.levels))
            ).cast(pa.string())
        else:
            cols[f.key] = _numeric_array(pa, v)
    for c in table.component_names():
        cols[c] = _numeric_array(pa, table.columns[c])
    buf = io.BytesIO()
    buf.write((",".join(cols) + "\n").encode())  # plain header: pyarrow would quote the names
    opts = pacsv.WriteOptions(include_header=False, quoting_style="none")
    pacsv.write_csv(pa.table(cols), buf, opts)
    return buf.getvalue()


def _numeric_array(pa: Any, v: np.ndarray) -> Any:
    missing = ~np.isfinite(v)
    finite = v[~missing]
    if np.all(finite == np.round(finite)) and (finite.size == 0 or np.abs(finite).max() < 2**53):
        return pa.array(np.where(missing, 0, v).astype(np.int64), mask=missing)
    return pa.array(v, mask=missing)
