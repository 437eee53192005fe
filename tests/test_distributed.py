"""Tests for slicefind.distributed: the Dask engine against the in-memory engine."""
import numpy as np
import pandas as pd
import pytest

import slicefind as sf

dd = pytest.importorskip("dask.dataframe")
distributed = pytest.importorskip("distributed")


def _table(n=12_000, seed=0):
    """A depot table of mixed column kinds with a planted slice on scanner S3 at high speed."""
    rng = np.random.default_rng(seed)
    frame = pd.DataFrame({
        "scanner": rng.choice(["S1", "S2", "S3", "S4"], n),
        "shift": pd.Categorical(rng.choice(["day", "night", "late"], n)),
        "belt_speed": np.round(rng.uniform(0.5, 3.0, n), 2),
        "lane": rng.integers(1, 6, n),
        "scanned_at": pd.Timestamp("2026-01-01") + pd.to_timedelta(rng.integers(0, 86400 * 30, n), unit="s"),
        "weight_g": np.where(rng.random(n) < 0.05, np.nan, rng.gamma(2, 500, n)),
        "parcel_id": [f"P{i:06d}" for i in range(n)],
        "label": rng.integers(0, 10, n),
    })
    bad = ((frame["scanner"] == "S3") & (frame["belt_speed"] >= 2.2)).to_numpy()
    wrong = rng.random(n) < np.where(bad, 0.5, 0.07)
    frame["pred"] = np.where(wrong, (frame["label"] + 1) % 10, frame["label"])
    return frame


def _uneven(frame, sizes):
    """The frame as a dask DataFrame of partitions of the given sizes."""
    bounds = np.cumsum([0] + list(sizes))
    assert bounds[-1] == len(frame)
    return dd.concat([dd.from_pandas(frame.iloc[a:b], npartitions=1)
                      for a, b in zip(bounds[:-1], bounds[1:])])


@pytest.fixture(scope="module")
def client():
    """A LocalCluster with 2 worker processes (as the issue asks), shared by the tests."""
    cluster = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                       dashboard_address=None)
    with distributed.Client(cluster) as c:
        yield c
    cluster.close()


def test_identical_to_in_memory_on_seven_uneven_partitions(client):
    """Table, every tested rule and the rows of each slice equal the in-memory engine's."""
    frame = _table()
    ddf = _uneven(frame, [600, 3000, 150, 2250, 2400, 1500, 2100])
    assert 7 == ddf.npartitions
    a = sf.find_slices(frame, label="label", prediction="pred", id_column="parcel_id")
    b = sf.find_slices(ddf, label="label", prediction="pred", id_column="parcel_id", client=client)
    pd.testing.assert_frame_equal(a.table, b.table)
    pd.testing.assert_frame_equal(a.tested, b.tested)
    assert "scanner = S3 and belt_speed >= 2.2" == b.table.loc[0, "description"]
    for sid in a.table["slice_id"]:
        assert a.rows(sid).tolist() == b.rows(sid).tolist()
    assert b.eval_table.id_column == "parcel_id"
    assert frame["parcel_id"].tolist() == b.eval_table.data["parcel_id"].tolist()


def test_worker_killed_mid_computation_changes_nothing(client):
    """A worker process killed while the search runs is replaced and the result is the same."""
    import threading
    import time

    frame = _table(seed=3)
    ddf = _uneven(frame, [4000, 4000, 4000])
    expected = sf.find_slices(frame, label="label", prediction="pred")
    workers = list(client.scheduler_info()["workers"])

    def kill_one():
        time.sleep(0.8)
        try:
            client.run(lambda: __import__("os")._exit(1), workers=[workers[0]])
        except Exception:        # the worker dies before it can answer
            pass

    killer = threading.Thread(target=kill_one)
    killer.start()
    got = sf.find_slices(ddf, label="label", prediction="pred", client=client)
    killer.join()
    client.wait_for_workers(2, timeout=60)
    assert workers[0] not in client.scheduler_info()["workers"]     # it really died
    pd.testing.assert_frame_equal(expected.table, got.table)
    pd.testing.assert_frame_equal(expected.tested, got.tested)


def _from_parts(parts):
    """A dask DataFrame whose partitions are exactly these pandas frames (no casting to meta)."""
    from dask import delayed

    return dd.from_delayed([delayed(lambda p=p: p)() for p in parts], meta=parts[0].head(0),
                           verify_meta=False)


def test_partition_with_missing_column_is_named(client):
    """A partition lacking a column gets an error naming the partition and the column."""
    frame = _table(n=3000)
    ddf = _from_parts([frame.iloc[:1500], frame.iloc[1500:].drop(columns=["lane"])])
    with pytest.raises(sf.SlicefindValueError, match=r"partition 1 has no column 'lane' \(partition 0 has it\)"):
        sf.find_slices(ddf, label="label", prediction="pred", client=client)


def test_partition_with_other_type_is_named(client):
    """A column of another type in one partition gets an error naming both types."""
    frame = _table(n=3000)
    other = frame.iloc[2000:].assign(lane=lambda f: f["lane"].astype(str))
    ddf = _from_parts([frame.iloc[:1000], frame.iloc[1000:2000], other])
    with pytest.raises(sf.SlicefindValueError, match=r"column 'lane' is (object|str) in partition 2 but int64 in partition 0"):
        sf.find_slices(ddf, label="label", prediction="pred", client=client)


def test_unsupported_options_are_named(client):
    """Options the Dask engine does not take yet are refused by name."""
    ddf = dd.from_pandas(_table(n=1000), npartitions=2)
    with pytest.raises(sf.SlicefindValueError, match="with a Dask DataFrame, embeddings, error_kind cannot be used yet"):
        sf.find_slices(ddf, label="label", prediction="pred", embeddings=np.zeros((1000, 2)),
                       error_kind="false_negative", client=client)
    with pytest.raises(sf.SlicefindTypeError, match="with a Dask DataFrame, label= must be a column name"):
        sf.find_slices(ddf, label=np.zeros(1000), prediction="pred", client=client)
    with pytest.raises(sf.SlicefindValueError, match="prediction='preds' is not a column of data. Did you mean 'pred'"):
        sf.find_slices(ddf, label="label", prediction="preds", client=client)
