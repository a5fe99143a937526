"""The stored form of a unit table: exact, deterministic round trips through Arrow IPC + zstd."""

from __future__ import annotations

import io

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
import pytest

from apportion.errors import InvalidInput
from apportion.ingest import decode_table, encode_table, parse_units
from apportion.stats.table import FeatureSpec, MetricSpec, UnitTable


def make_table(n: int = 1000, seed: int = 11) -> UnitTable:
    rng = np.random.default_rng(seed)
    tenure = rng.gamma(2.0, 30.0, n)
    tenure[rng.random(n) < 0.1] = np.nan
    level = rng.integers(-1, 3, n).astype(np.int32)  # -1 = missing
    return UnitTable(
        unit_ids=np.asarray([f"m{i}" for i in range(n)], dtype=object),
        arm=rng.integers(0, 3, n).astype(np.int64),
        arm_keys=("control", "short", "long"),
        design_shares=np.asarray([0.5, 0.3, 0.2]),
        features=(
            FeatureSpec("tenure_days", "numeric"),
            FeatureSpec("level", "categorical", ("advanced", "beginner", "intermediate")),
        ),
        feature_values={"tenure_days": tenure, "level": level},
        metrics=(
            MetricSpec("completed", "proportion"),
            MetricSpec("mpl", "ratio", "lower", numerator="mistakes", denominator="lessons"),
        ),
        columns={
            "completed": rng.integers(0, 2, n).astype(np.float64),
            "mistakes": rng.poisson(3, n).astype(np.float64),
            "lessons": rng.poisson(2, n).astype(np.float64),
        },
    )


def assert_same(a: UnitTable, b: UnitTable) -> None:
    assert a.unit_ids.dtype == b.unit_ids.dtype == object
    assert a.unit_ids.tolist() == b.unit_ids.tolist()
    assert a.arm.dtype == b.arm.dtype
    np.testing.assert_array_equal(a.arm, b.arm)
    assert a.arm_keys == b.arm_keys and a.features == b.features and a.metrics == b.metrics
    np.testing.assert_array_equal(a.design_shares, b.design_shares)
    assert list(a.feature_values) == list(b.feature_values)
    for k in a.feature_values:
        assert a.feature_values[k].dtype == b.feature_values[k].dtype
        np.testing.assert_array_equal(a.feature_values[k], b.feature_values[k])  # NaN == NaN here
    assert list(a.columns) == list(b.columns)
    for k in a.columns:
        assert a.columns[k].dtype == b.columns[k].dtype
        np.testing.assert_array_equal(a.columns[k], b.columns[k])


def test_round_trip_is_exact():
    t = make_table()
    holdout = np.random.default_rng(2).random(t.n) < 0.1
    back, flags = decode_table(encode_table(t, {"holdout": holdout}))
    assert_same(t, back)
    assert list(flags) == ["holdout"] and flags["holdout"].dtype == bool
    np.testing.assert_array_equal(flags["holdout"], holdout)


def test_shares_that_are_not_short_decimals_survive():
    t = make_table(10)
    shares = np.asarray([1 / 3, 1 / 3, 1 - 2 / 3])
    t = UnitTable(**{**t.__dict__, "design_shares": shares})
    back, _ = decode_table(encode_table(t))
    assert back.design_shares.tolist() == shares.tolist()  # bit for bit


def test_encoding_is_deterministic():
    a = encode_table(make_table(seed=5))
    b = encode_table(make_table(seed=5))
    assert a == b
    assert encode_table(decode_table(a)[0]) == a
    assert encode_table(make_table(seed=6)) != a


def test_decoded_arrays_are_writable_copies():
    back, _ = decode_table(encode_table(make_table(50)))
    assert back.arm.flags.writeable and back.columns["lessons"].flags.writeable


def test_names_that_collide_across_roles_round_trip():
    # a feature, a component column and a flag may share a name with each other and with 'arm'
    n = 4
    t = UnitTable(
        unit_ids=np.asarray(["a", "b", "c", "d"], dtype=object),
        arm=np.asarray([0, 1, 0, 1]),
        arm_keys=("control", "arm"),
        design_shares=np.asarray([0.5, 0.5]),
        features=(FeatureSpec("arm", "numeric"), FeatureSpec("unit_id", "categorical", ("x",))),
        feature_values={"arm": np.arange(n, dtype=float), "unit_id": np.zeros(n, dtype=np.int32)},
        metrics=(MetricSpec("arm", "mean"),),
        columns={"arm": np.asarray([1.5, 2.5, 3.5, 4.5])},
    )
    back, flags = decode_table(encode_table(t, {"arm": np.asarray([True, False, True, False])}))
    assert_same(t, back)
    np.testing.assert_array_equal(flags["arm"], [True, False, True, False])


def test_blob_is_compressed():
    t = make_table(20_000)
    raw = sum(v.nbytes for v in t.columns.values()) + t.arm.nbytes
    raw += sum(v.nbytes for v in t.feature_values.values())
    # small-integer columns stored as float64 compress several-fold; 1/2 leaves a wide margin
    assert len(encode_table(t)) < raw / 2


def test_parsed_upload_round_trips():
    cols = {
        "unit_id": [3, 1, 2],
        "arm": ["b", "a", "a"],
        "level": ["x", None, "y"],
        "completed": [1, 0, 1],
        "holdout": ["true", "false", "false"],
    }
    sink = io.BytesIO()
    pacsv.write_csv(pa.table(cols), sink)
    parsed = parse_units(
        sink.getvalue(),
        "text/csv",
        arms=["a", "b"],
        control="a",
        design_shares=[0.5, 0.5],
        metrics=(MetricSpec("completed", "proportion"),),
        features=(FeatureSpec("level", "categorical"),),
        flag_columns=["holdout"],
    )
    back, flags = decode_table(encode_table(parsed.table, parsed.flags))
    assert_same(parsed.table, back)
    np.testing.assert_array_equal(flags["holdout"], [True, False, False])


def test_length_mismatch_is_refused():
    t = make_table(10)
    with pytest.raises(InvalidInput, match="column 'c0' has 9 rows, the table has 10"):
        encode_table(UnitTable(**{**t.__dict__, "columns": {"completed": np.zeros(9)}}))


@pytest.mark.parametrize(
    "data",
    [b"not arrow at all", b""],
    ids=["garbage", "empty"],
)
def test_foreign_bytes_are_refused(data):
    with pytest.raises(InvalidInput, match="not a stored unit table"):
        decode_table(data)


def test_an_arrow_stream_without_our_metadata_is_refused():
    sink = pa.BufferOutputStream()
    batch = pa.record_batch([pa.array([1, 2])], names=["x"])
    with pa.ipc.new_stream(sink, batch.schema) as w:
        w.write_batch(batch)
    with pytest.raises(InvalidInput, match="not a stored unit table"):
        decode_table(sink.getvalue().to_pybytes())
