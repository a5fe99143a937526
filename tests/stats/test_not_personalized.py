"""A feature declared `personalize: false` is never a split variable, whatever the method.

The readout here is built so that the treatment effect varies ONLY with `age_band`: the oldest
band gains one standard deviation on `score`, the other bands lose half of one (so the best arm
differs by band, which a decision-focused tree needs before it splits), and `x` and `device` are
noise. Each method is fitted twice on the same rows: with the flag on `age_band` the fit must not
use it (no split, not among the partition's features, so no compiled plan refers to it); without
the flag the same fit splits on `age_band`, which shows the data does drive a split on it and
the first assertion could fail.

The effects (+1 and -0.5 sd, 8,000 units, two arms) are far above what these trees need to find
a split (a difference of means with se about sqrt(2/1300) = 0.04 per arm and band), so the
control fits split on it for any seed; the seeds are fixed anyway.
"""

from __future__ import annotations

from dataclasses import replace

import pytest
from support import effect_by_band_only

from apportion.errors import InvalidInput
from apportion.stats.models import fit_cohort_model, validate_params

SMALL = {"min_units_per_arm": 100, "max_depth": 2, "seed": 3}
CASES = {
    "causal_tree": {**SMALL, "cv_folds": 0},
    "intersect": {**SMALL, "max_depth": 1},
    "two_model": {**SMALL, "max_iter": 30, "folds": 2, "min_samples_leaf": 100},
    "forest": {**SMALL, "n_trees": 10},
    "policy_tree": {**SMALL},
}


def _used(fit) -> set[str]:  # type: ignore[no-untyped-def]
    split = {s["feature"] for s in fit.diagnostics.get("splits", [])}
    return split | set(fit.diagnostics["features_used"])


@pytest.mark.parametrize("method", sorted(CASES))
def test_a_feature_not_for_personalization_is_never_split_on(method: str) -> None:
    params = CASES[method]
    control = fit_cohort_model(effect_by_band_only(flagged=False), method, params,
                               success_metric="score")  # fmt: skip
    assert "age_band" in _used(control), "the readout must drive a split on age_band"
    fit = fit_cohort_model(effect_by_band_only(flagged=True), method, params,
                           success_metric="score")  # fmt: skip
    assert "age_band" not in _used(fit)
    assert "age_band" not in [f.key for f in fit.partition.features]
    assert "age_band" not in fit.params["features"]
    assert all("age_band" not in rule for rule in fit.partition.cohort_rules())


def test_segments_refuses_the_feature_and_leaves_it_out_otherwise() -> None:
    flagged = effect_by_band_only(flagged=True)
    with pytest.raises(InvalidInput, match="not for personalization"):
        fit_cohort_model(flagged, "segments", {"features": ["age_band", "device"]})
    control = fit_cohort_model(effect_by_band_only(flagged=False), "segments",
                               {"features": ["age_band", "device"]})  # fmt: skip
    assert "age_band" in _used(control)
    fit = fit_cohort_model(flagged, "segments", {"features": ["device", "x"]})
    assert "age_band" not in _used(fit)
    assert "age_band" not in [f.key for f in fit.partition.features]


@pytest.mark.parametrize("method", ["global", "segments", *sorted(CASES)])
def test_naming_the_feature_is_refused_and_the_default_leaves_it_out(method: str) -> None:
    table = effect_by_band_only(200, flagged=True)
    with pytest.raises(InvalidInput, match=r"\['age_band'\], declared not for personalization"):
        validate_params(method, {"features": ["x", "age_band"]}, table)
    if method != "segments":  # segments has no default: its features are required
        assert validate_params(method, {}, table)["features"] == ["x", "device"]


@pytest.mark.parametrize("method", ["global", *sorted(CASES)])
def test_every_feature_excluded_leaves_one_cohort_or_a_clear_refusal(method: str) -> None:
    table = effect_by_band_only(flagged=True)
    only = replace(table, features=(table.features[0],))
    params = CASES.get(method, {})
    if method in ("two_model", "forest"):  # their outcome models need an input
        with pytest.raises(InvalidInput, match="every declared feature is personalize: false"):
            fit_cohort_model(only, method, params, success_metric="score")
        return
    fit = fit_cohort_model(only, method, params, success_metric="score")
    assert fit.partition.n_cohorts == 1 and not fit.partition.features


def test_a_stored_readout_keeps_the_flag() -> None:
    # the readout's manifest travels with its Parquet files; a fit on the engines reads the
    # features from it, so the flag must survive the round trip (and old manifests, without
    # the key, read as personalize: true)
    from apportion.ingest.dataset import DatasetSpec

    table = effect_by_band_only(10, flagged=True)
    spec = DatasetSpec(table.arm_keys, (0.5, 0.5), table.features, table.metrics, ("score", "cost"))
    d = spec.to_dict()
    assert [f.get("personalize", True) for f in d["features"]] == [False, True, True]
    assert DatasetSpec.from_dict(d) == spec
    assert all(f.personalize for f in DatasetSpec.from_dict(effect_spec_without_flag(d)).features)


def effect_spec_without_flag(d: dict) -> dict:  # type: ignore[type-arg]
    return {**d, "features": [{k: v for k, v in f.items() if k != "personalize"}
                              for f in d["features"]]}  # fmt: skip
