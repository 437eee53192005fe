"""Tests for slicefind.discovery.distributed: the Dask engine against the in-memory engine."""
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


def _binary_table(n=12_000, seed=0):
    """The depot table with a binary label whose misses (false negatives) pile up on
    scanner S3 at high speed, while false positives are spread evenly."""
    frame = _table(n, seed).drop(columns=["label", "pred"])
    rng = np.random.default_rng(seed + 1)
    frame["label"] = (rng.random(n) < 0.5).astype(int)
    bad = ((frame["scanner"] == "S3") & (frame["belt_speed"] >= 2.2)).to_numpy()
    miss = rng.random(n) < np.where(bad & (frame["label"] == 1), 0.5, 0.07)
    frame["pred"] = np.where(miss, 1 - frame["label"], frame["label"])
    return frame


def _assert_same(a, b):
    """Two results of find_slices are the same: tables, tested rules, rows, analysed rows."""
    pd.testing.assert_frame_equal(a.table, b.table)
    pd.testing.assert_frame_equal(a.tested, b.tested)
    for sid in a.table["slice_id"]:
        assert a.rows(sid).tolist() == b.rows(sid).tolist()
    ta, tb = a.eval_table, b.eval_table
    assert ta.positions.dtype == tb.positions.dtype
    assert ta.positions.tolist() == tb.positions.tolist()
    assert (ta.n_input_rows, ta.error_definition, ta.skipped) == \
        (tb.n_input_rows, tb.error_definition, tb.skipped)
    assert ta.errors.tolist() == tb.errors.tolist()
    assert ta.label.tolist() == tb.label.tolist()


def _uneven(frame, sizes):
    """The frame as a dask DataFrame of partitions of the given sizes (object columns, such
    as a column of vectors, kept as they are, as dd.read_parquet loads a list column)."""
    import dask

    bounds = np.cumsum([0] + list(sizes))
    assert bounds[-1] == len(frame)
    with dask.config.set({"dataframe.convert-string": False}):
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


@pytest.mark.parametrize("options", [{}, {"error_kind": "false_negative"}], ids=["all", "false_negative"])
def test_worker_killed_mid_computation_changes_nothing(client, monkeypatch, options):
    """A worker process killed once the items are packed (its bitsets, partitions and kept
    rows lost) is replaced, its tasks rerun from their partitions, and the result is the same."""
    import os

    import slicefind.discovery.distributed as engine

    frame = _binary_table(seed=3)
    ddf = _uneven(frame, [4000, 4000, 4000])
    expected = sf.find_slices(frame, label="label", prediction="pred", **options)
    workers = list(client.scheduler_info()["workers"])
    held = []
    search = engine.search_levels

    def search_after_a_kill(*args, **kwargs):
        held.append(len(client.has_what()[workers[0]]))
        try:
            client.run(lambda: os._exit(1), workers=[workers[0]])
        except Exception:        # the worker dies before it can answer
            pass
        return search(*args, **kwargs)

    monkeypatch.setattr(engine, "search_levels", search_after_a_kill)
    got = sf.find_slices(ddf, label="label", prediction="pred", client=client, **options)
    client.wait_for_workers(2, timeout=60)
    assert held and held[0] > 0                                       # it held results ...
    assert workers[0] not in client.scheduler_info()["workers"]      # ... and really died
    _assert_same(expected, got)


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


def test_false_negatives_identical_to_in_memory(client):
    """error_kind="false_negative" keeps the positives in every partition, as in memory."""
    frame = _binary_table()
    ddf = _uneven(frame, [600, 3000, 150, 2250, 2400, 1500, 2100])
    a = sf.find_slices(frame, label="label", prediction="pred", error_kind="false_negative",
                       id_column="parcel_id")
    b = sf.find_slices(ddf, label="label", prediction="pred", error_kind="false_negative",
                       id_column="parcel_id", client=client)
    _assert_same(a, b)
    positives = np.flatnonzero(frame["label"].to_numpy() == 1)
    assert positives.tolist() == b.eval_table.positions.tolist()       # positive=1 inferred
    assert "false negative (positive = 1)" == b.eval_table.error_definition
    assert "scanner = S3 and belt_speed >= 2.2" == b.table.loc[0, "description"]
    assert frame["parcel_id"].to_numpy()[positives].tolist() == b.eval_table.data["parcel_id"].tolist()
    rows = b.rows(b.table.loc[0, "slice_id"])
    assert (frame["label"].to_numpy()[rows] == 1).all()


def test_false_positives_with_named_positive_identical(client):
    """positive= names the class; error_kind="false_positive" keeps its negatives."""
    frame = _binary_table(seed=2).assign(label=lambda f: f["label"].map({0: "ok", 1: "damaged"}),
                                         pred=lambda f: f["pred"].map({0: "ok", 1: "damaged"}))
    ddf = _uneven(frame, [5000, 37, 4963, 2000])
    a = sf.find_slices(frame, label="label", prediction="pred", error_kind="false_positive",
                       positive="damaged", min_rows=100)
    b = sf.find_slices(ddf, label="label", prediction="pred", error_kind="false_positive",
                       positive="damaged", min_rows=100, client=client)
    _assert_same(a, b)
    assert np.flatnonzero(frame["label"].to_numpy() == "ok").tolist() == b.eval_table.positions.tolist()
    assert "false positive (positive = 'damaged')" == b.eval_table.error_definition


def test_true_class_identical_to_in_memory(client):
    """true_class= keeps that class's rows of every partition, positions into the whole frame."""
    frame = _table(n=20_000, seed=4)
    ddf = _uneven(frame, [1000, 7000, 64, 5936, 6000])
    a = sf.find_slices(frame, label="label", prediction="pred", true_class=3, id_column="parcel_id")
    b = sf.find_slices(ddf, label="label", prediction="pred", true_class=3, id_column="parcel_id",
                       client=client)
    _assert_same(a, b)
    assert np.flatnonzero(frame["label"].to_numpy() == 3).tolist() == b.eval_table.positions.tolist()
    assert 20_000 == b.eval_table.n_input_rows
    assert "label != prediction, label = 3" == b.eval_table.error_definition
    assert "scanner = S3 and belt_speed >= 2.2" == b.table.loc[0, "description"]


def test_bad_positive_and_true_class_are_named(client):
    """The same errors as in memory for a positive= or true_class= the labels do not hold."""
    frame = _binary_table(n=3000)
    ddf = dd.from_pandas(frame, npartitions=3)
    with pytest.raises(sf.SlicefindValueError,
                       match=r"positive='yes' is not a label value; labels are \['0', '1'\]"):
        sf.find_slices(ddf, label="label", prediction="pred", error_kind="false_negative",
                       positive="yes", client=client)
    with pytest.raises(sf.SlicefindValueError, match=r"true_class=7 never occurs in label"):
        sf.find_slices(ddf, label="label", prediction="pred", true_class=7, client=client)
    multi = dd.from_pandas(_table(n=3000), npartitions=3)
    with pytest.raises(sf.SlicefindValueError,
                       match=r"is for binary tasks, but label has 10 classes; pass positive="):
        sf.find_slices(multi, label="label", prediction="pred", error_kind="false_negative", client=client)
    with pytest.raises(sf.SlicefindValueError,
                       match=r"error_kind= and true_class= need label= and prediction="):
        sf.find_slices(ddf.assign(wrong=ddf["label"] != ddf["pred"]), errors="wrong",
                       error_kind="false_negative", client=client)
    with pytest.raises(sf.SlicefindValueError, match=r"error_kind must be one of .*; got 'misses'"):
        sf.find_slices(ddf, label="label", prediction="pred", error_kind="misses", client=client)


def test_missing_label_in_a_left_out_row_is_still_an_error(client):
    """Labels are checked on every row before error_kind= leaves rows out, as in memory."""
    frame = _binary_table(n=3000).assign(label=lambda f: f["label"].astype(float))
    frame.loc[2500, "label"] = np.nan
    with pytest.raises(sf.SlicefindValueError, match="label"):
        sf.find_slices(frame, label="label", prediction="pred", error_kind="false_negative", positive=1.0)
    with pytest.raises(sf.SlicefindValueError, match=r"column 'label' has 1 missing values \(NaN/None\) in partition 2, first at its row 500"):
        sf.find_slices(dd.from_pandas(frame, npartitions=3), label="label", prediction="pred",
                       error_kind="false_negative", positive=1.0, client=client)


def test_categories_that_differ_between_partitions(client):
    """Partitions whose categoricals list other categories are mined as their concatenation."""
    rng = np.random.default_rng(7)
    parts = []
    for cats in (["day", "night"], ["late", "night", "day"], ["night", "early"]):
        part = _table(n=4000, seed=len(parts)).drop(columns=["shift"])
        part.insert(1, "shift", pd.Categorical(rng.choice(cats, 4000), categories=cats))
        bad = (part["shift"] == "late").to_numpy()
        part["pred"] = np.where(bad & (rng.random(4000) < 0.4), (part["label"] + 1) % 10, part["pred"])
        parts.append(part)
    ddf = _from_parts(parts)
    whole = ddf.compute()
    assert ["day", "night", "late", "early"] == whole["shift"].cat.categories.tolist()
    a = sf.find_slices(whole, label="label", prediction="pred", exclude=["parcel_id"])
    b = sf.find_slices(ddf, label="label", prediction="pred", exclude=["parcel_id"], client=client)
    pd.testing.assert_frame_equal(a.table, b.table)
    pd.testing.assert_frame_equal(a.tested, b.tested)
    assert "shift = late" in set(b.tested["description"])
    late = b.tested.set_index("description").loc["shift = late"]
    assert (int((whole["shift"] == "late").sum()), int((whole["shift"] == "early").sum())) == \
        (late["n_rows"], b.tested.set_index("description").loc["shift = early", "n_rows"])


def test_items_with_the_same_rows_are_kept_once(client):
    """Candidates of one column with the same rows (compared by hash on the workers) are kept
    once, the first as in memory: here every parcel ships Monday 9:00 or Tuesday 17:00."""
    frame = _table(n=6000, seed=5)
    rng = np.random.default_rng(5)
    monday = rng.random(6000) < 0.3
    frame["shipped_at"] = np.where(monday, pd.Timestamp("2026-03-02 09:00"), pd.Timestamp("2026-03-03 17:00"))
    frame["pred"] = np.where(monday & (rng.random(6000) < 0.3), (frame["label"] + 1) % 10, frame["pred"])
    ddf = _uneven(frame, [1000, 2500, 2500])
    a = sf.find_slices(frame, label="label", prediction="pred", id_column="parcel_id")
    b = sf.find_slices(ddf, label="label", prediction="pred", id_column="parcel_id", client=client)
    _assert_same(a, b)
    tested = set(b.tested["description"])
    assert {"hour of shipped_at = 9", "hour of shipped_at = 17"} <= tested
    assert not {"weekday of shipped_at = Mon", "weekday of shipped_at = Tue"} & tested
    assert "hour of shipped_at = 9" in b.table.loc[0, "description"]


def test_smallest_keys_are_a_stable_argsort_head():
    """The sample's rows: the k smallest keys in key order, ties by position."""
    from slicefind.discovery.distributed import _smallest

    keys = np.random.default_rng(0).integers(0, 50, 1000).astype(float)   # many ties
    for k in (1, 7, 100, 999, 1000, 5000):
        assert np.argsort(keys, kind="stable")[:k].tolist() == _smallest(keys, k).tolist()


def test_numeric_cuts_from_a_sample(client):
    """With fewer sample rows than rows, cut points come from the sample and still find the
    planted threshold; the same seed gives the same items."""
    from slicefind.discovery.distributed import mine_dask
    from slicefind.discovery.records import default_min_rows

    frame = _table(n=12_000, seed=6)
    ddf = _uneven(frame, [5000, 1000, 6000])
    runs = [mine_dask(ddf, label="label", prediction="pred", exclude=["parcel_id"], client=client,
                      min_rows_for=default_min_rows, min_errors_for=lambda n, k, m: 3,
                      sample_rows=3000, random_state=seed) for seed in (0, 0, 1)]
    texts = [[item.text for item in run.items.items] for run in runs]
    assert texts[0] == texts[1]
    assert texts[0] != texts[2]                  # other rows drawn, other quantile cuts
    assert "belt_speed >= 2.2" in texts[0] and "belt_speed >= 2.2" in texts[2]
    assert 12_000 == runs[0].table.n_rows and "sample pass" in runs[0].seconds


def test_unsupported_options_are_named(client):
    """Options the Dask engine does not take are refused by name."""
    ddf = dd.from_pandas(_table(n=1000), npartitions=2)
    with pytest.raises(sf.SlicefindValueError, match="with a Dask DataFrame, engine='mlxtend' cannot be used"):
        sf.find_slices(ddf, label="label", prediction="pred", engine="mlxtend", client=client)
    with pytest.raises(sf.SlicefindTypeError, match="with a Dask DataFrame, label= must be a column name"):
        sf.find_slices(ddf, label=np.zeros(1000), prediction="pred", client=client)
    with pytest.raises(sf.SlicefindValueError, match="prediction='preds' is not a column of data. Did you mean 'pred'"):
        sf.find_slices(ddf, label="label", prediction="preds", client=client)


# ---------------------------------------------------------------- embedding clusters

def _with_vectors(n=6000, seed=0, d=12):
    """The depot table plus a vector column 'emb' (one float32 array per row): three blobs,
    the third erring more, and the last 300 rows copies of the first 300 (duplicates that
    land in other partitions)."""
    from sklearn.datasets import make_blobs

    frame = _table(n=n, seed=seed)
    x, blob = make_blobs(n_samples=n, centers=3, n_features=d, random_state=seed, cluster_std=1.5)
    x = x.astype(np.float32)
    x[n - 300:], blob[n - 300:] = x[:300], blob[:300]
    wrong = np.random.default_rng(seed + 1).random(n) < np.where(blob == 2, 0.35, 0.05)
    frame["pred"] = np.where(wrong, (frame["label"] + 1) % 10, frame["label"])
    frame["emb"] = list(x)
    return frame, x


#: small enough that the fit runs on a sample and the map on part of it
SAMPLED = {"sample_above": 2000, "sample_size": 1500, "map_size": 500}
UNEVEN = [500, 1400, 150, 1250, 900, 700, 1100]


def _same_clusters(a, b):
    """Tables, tests, slice rows, labels, coordinates and map of two scans are equal."""
    pd.testing.assert_frame_equal(a.table, b.table)
    pd.testing.assert_frame_equal(a.tested, b.tested)
    for sid in a.table["slice_id"]:
        assert a.rows(sid).tolist() == b.rows(sid).tolist()
    ca, cb = a.extras["clusters"], b.extras["clusters"]
    assert ca.labels.keys() == cb.labels.keys()
    for key in ca.labels:
        assert np.array_equal(ca.labels[key], cb.labels[key])
    assert np.array_equal(ca.coords, cb.coords)
    assert np.array_equal(ca.map_xy, cb.map_xy)
    assert ca.diagnostics["n_distinct"] == cb.diagnostics["n_distinct"]


def test_embedding_clusters_identical_to_in_memory(client):
    """With a vector column the Dask engine fits on the same sample and places every row on
    its own partition: table, tests, rows, labels, coordinates and map equal in-memory's."""
    frame, x = _with_vectors()
    ddf = _uneven(frame, UNEVEN)
    opts = dict(label="label", prediction="pred", cluster_options=SAMPLED)
    a = sf.find_slices(frame.drop(columns="emb"), embeddings=x, **opts)
    b = sf.find_slices(ddf, embeddings="emb", client=client, **opts)
    _same_clusters(a, b)
    clusters = b.extras["clusters"]
    assert clusters.diagnostics["sampled"] and 1500 == clusters.diagnostics["n_fit"]
    assert 6000 - 300 == clusters.diagnostics["n_distinct"]
    assert {"rule", "region", "error_mode"} == set(b.tested["source"])
    assert (b.table["source"] != "rule").any()
    assert "embeddings column" == b.eval_table.skipped["emb"]
    # the cluster descriptions count items on the workers: the same text as in memory
    assert any("errors" in d for d in b.table.loc[b.table["source"] != "rule", "description"])


def test_embeddings_as_arrays_and_columns_give_one_result(client):
    """A numpy array, a dask array chunked unlike the partitions and one column per
    dimension all give the result of the vector column, with a row filter (false negatives)."""
    da = pytest.importorskip("dask.array")
    frame, x = _with_vectors(n=3000, seed=2, d=6)
    frame["label"] = frame["label"] % 2
    frame["pred"] = frame["pred"] % 2
    dims = {f"e{j}": x[:, j] for j in range(6)}
    sizes = [400, 900, 300, 1400]
    opts = dict(label="label", prediction="pred", error_kind="false_negative", client=client,
                cluster_options={"sample_above": 1000, "sample_size": 800})
    base = sf.find_slices(_uneven(frame, sizes), embeddings="emb", **opts)
    memory = sf.find_slices(frame.drop(columns="emb"), embeddings=x,
                            **{k: v for k, v in opts.items() if k != "client"})
    _same_clusters(memory, base)
    plain = frame.drop(columns="emb")
    for embeddings, data in ((x, plain), (da.from_array(x, chunks=(700, 3)), plain),
                             (list(dims), plain.assign(**dims))):
        _same_clusters(base, sf.find_slices(_uneven(data, sizes), embeddings=embeddings, **opts))


def test_bad_embeddings_are_named(client):
    """A missing column, vectors of other lengths, NaN and a wrong row count get errors that
    name the column, the partition or the row."""
    frame, x = _with_vectors(n=2000, seed=4, d=4)
    opts = dict(label="label", prediction="pred", client=client)
    with pytest.raises(sf.SlicefindValueError, match="embeddings names 'embs', which is not a column of data. Did you mean 'emb'"):
        sf.find_slices(_uneven(frame, [1000, 1000]), embeddings="embs", **opts)
    short = frame.copy()
    short.at[1500, "emb"] = np.zeros(3, dtype=np.float32)
    with pytest.raises(sf.SlicefindValueError, match=r"embeddings column 'emb' holds vectors of 4 and 3 values \(row 500 of its partition\)"):
        sf.find_slices(_uneven(short, [1000, 1000]), embeddings="emb", **opts)
    other = frame.copy()
    other["emb"] = [v[:3] for v in x]
    mixed = pd.concat([frame.iloc[:1000], other.iloc[1000:]])
    with pytest.raises(sf.SlicefindValueError, match="embeddings have 4 dimensions in partition 0 but 3 in partition 1"):
        sf.find_slices(_uneven(mixed, [1000, 1000]), embeddings="emb", **opts)
    holes = x.copy()
    holes[1234, 2] = np.nan
    with pytest.raises(sf.SlicefindValueError, match=r"embeddings holds 1 rows with NaN or inf, first at row 1234 \(column 2: nan\)"):
        sf.find_slices(_uneven(frame.drop(columns="emb"), [1000, 1000]), embeddings=holes, **opts)
    with pytest.raises(sf.SlicefindValueError, match="embeddings has 1999 rows but data has 2000"):
        sf.find_slices(_uneven(frame.drop(columns="emb"), [1000, 1000]), embeddings=x[:-1], **opts)
    with pytest.raises(sf.SlicefindTypeError, match="embeddings= must name columns of data or be a numpy or dask array; got dict"):
        sf.find_slices(_uneven(frame.drop(columns="emb"), [1000, 1000]), embeddings={"a": 1}, **opts)


def test_cli_scan_with_dask_engine_and_vector_column(client, tmp_path, capsys):
    """`slicefind scan FOLDER --engine dask --embeddings COL` writes the slices.csv of the
    in-memory scan of the same rows with the vectors from a .npy file."""
    from slicefind.cli import main

    frame, x = _with_vectors(n=3000, seed=5, d=8)
    folder = tmp_path / "logs"
    folder.mkdir()
    for i, (a, b) in enumerate([(0, 1100), (1100, 1900), (1900, 3000)]):
        frame.iloc[a:b].to_parquet(folder / f"part-{i}.parquet", index=False)
    frame.drop(columns="emb").to_parquet(tmp_path / "all.parquet", index=False)
    np.save(tmp_path / "emb.npy", x)
    common = ["--label", "label", "--prediction", "pred", "--exclude", "parcel_id"]
    assert 0 == main(["scan", str(folder), *common, "--engine", "dask", "--embeddings", "emb",
                      "--out", str(tmp_path / "ws_dask")])
    assert "emb (embeddings column)" in capsys.readouterr().out
    assert 0 == main(["scan", str(tmp_path / "all.parquet"), *common, "--embeddings",
                      str(tmp_path / "emb.npy"), "--out", str(tmp_path / "ws_memory")])
    want = pd.read_csv(tmp_path / "ws_memory" / "slices.csv")
    pd.testing.assert_frame_equal(want, pd.read_csv(tmp_path / "ws_dask" / "slices.csv"))
    assert (want["source"] != "rule").any()
    # the .npy file read by the workers piece by piece (the vector column left unmined)
    assert 0 == main(["scan", str(folder), *common, "emb", "--engine", "dask", "--embeddings",
                      str(tmp_path / "emb.npy"), "--out", str(tmp_path / "ws_npy")])
    pd.testing.assert_frame_equal(want, pd.read_csv(tmp_path / "ws_npy" / "slices.csv"))
    assert 1 == main(["scan", str(folder), *common, "--engine", "dask", "--embeddings", "vectors",
                      "--out", str(tmp_path / "ws_bad")])
    assert "--embeddings 'vectors' is neither a file nor a column of DATA." in capsys.readouterr().err


def test_worker_killed_before_rows_are_placed_changes_nothing(client, monkeypatch):
    """A worker killed after the fit, holding vectors, item bitsets and partitions, is
    replaced; its pieces are recomputed (a numpy array's pieces are part of the graph) and
    the clusters equal the in-memory ones."""
    import os

    import slicefind.discovery.distributed as engine

    frame, x = _with_vectors(n=3000, seed=6, d=6)
    plain = frame.drop(columns="emb")
    opts = dict(label="label", prediction="pred", cluster_options={"sample_above": 1000, "sample_size": 800})
    expected = sf.find_slices(plain, embeddings=x, **opts)
    workers = list(client.scheduler_info()["workers"])
    place = engine.DaskRows.place

    def place_after_a_kill(self, *args, **kwargs):
        try:
            client.run(lambda: os._exit(1), workers=[workers[0]])
        except Exception:        # the worker dies before it can answer
            pass
        return place(self, *args, **kwargs)

    monkeypatch.setattr(engine.DaskRows, "place", place_after_a_kill)
    got = sf.find_slices(_uneven(plain, [700, 1300, 1000]), embeddings=x, client=client, **opts)
    client.wait_for_workers(2, timeout=60)
    assert workers[0] not in client.scheduler_info()["workers"]
    _same_clusters(expected, got)
