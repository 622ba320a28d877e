"""The Dask backend of map_ordered, --cluster on scan/prepare, and partitioned Parquet manifests.

The cluster tests start a real distributed.LocalCluster: two worker processes with one thread
each, on loopback only, so every chunk really is pickled, sent to another process and back.
"""

from __future__ import annotations

import time

import pytest

from labelprep import manifest, parallel
from labelprep.cli import main
from labelprep.errors import InputError, OutputExistsError, ParameterError
from labelprep.parallel import map_ordered
from labelprep.scanner import scan

distributed = pytest.importorskip("distributed")


@pytest.fixture(scope="module")
def address():
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  host="127.0.0.1", dashboard_address=":0") as cluster:
        yield cluster.scheduler_address


@pytest.fixture
def faulty_tree(class_tree, write_image):
    """class_tree plus files that fail in different ways, so fault rows are compared too."""
    good = write_image(class_tree / "eel" / "whole.png", seed=40, fmt="PNG").read_bytes()
    (class_tree / "eel" / "cut.png").write_bytes(good[: len(good) // 2])
    (class_tree / "dog" / "notes.txt").write_text("not an image\n")
    (class_tree / "cat" / "empty.jpg").write_bytes(b"")
    return class_tree


def test_cluster_manifest_is_byte_identical_to_local(faulty_tree, tmp_path, runner, address):
    local, remote = tmp_path / "local.csv", tmp_path / "remote.csv"
    for out, where in ((local, ["--jobs", "1"]), (remote, ["--cluster", address])):
        result = runner.invoke(main, ["scan", str(faulty_tree), "-o", str(out), "-q", *where])
        assert result.exit_code == 0, result.output
    assert local.read_bytes() == remote.read_bytes()
    m = manifest.read(remote)
    # the tree's faults reached the manifest, so the comparison covered them
    assert {"truncated", "not-image", "empty"} <= set(m["fault"])
    assert len(m) == 12 + 4


def test_prepare_on_cluster_matches_local(class_tree, tmp_path, runner, address):
    outs = {}
    for name, where in (("local", ["--jobs", "1"]), ("remote", ["--cluster", address])):
        outs[name] = tmp_path / name
        result = runner.invoke(main, ["prepare", str(class_tree), "--out", str(outs[name]), "-q",
                                      "--group-pattern", r"/(g\d)_", *where])
        assert result.exit_code == 0, result.output
    assert (outs["local"] / "manifest.csv").read_bytes() == (outs["remote"] / "manifest.csv").read_bytes()


def test_order_and_errors_in_place_on_cluster(address):
    assert list(map_ordered(abs, range(-7, 7), cluster=address, chunksize=3)) == \
        [abs(i) for i in range(-7, 7)]
    got = []
    with pytest.raises(ValueError, match="'x'"):
        for value in map_ordered(int, ["1", "2", "x", "4"], cluster=address, chunksize=1):
            got.append(value)
    assert got == [1, 2]  # the failure surfaces at its own item, after the ones before it


def test_early_close_cancels_queued_chunks(address):
    # 40 chunks of 0.25 s: finishing them all would take 5 s on two workers
    results = map_ordered(time.sleep, [0.25] * 40, cluster=address, chunksize=1)
    next(results)
    results.close()
    with distributed.Client(address, set_as_default=False) as client:
        deadline = time.monotonic() + 3
        left = client.run_on_scheduler(lambda dask_scheduler: len(dask_scheduler.tasks))
        while left and time.monotonic() < deadline:
            time.sleep(0.05)
            left = client.run_on_scheduler(lambda dask_scheduler: len(dask_scheduler.tasks))
    assert left == 0


def test_shared_argument_reaches_every_item(address):
    """A shared value is scattered once and passed to func after each item, on and off a cluster."""
    got = list(map_ordered(pow, [1, 2, 3, 4], cluster=address, chunksize=1, shared=3))
    assert got == [1, 8, 27, 64] == list(map_ordered(pow, [1, 2, 3, 4], jobs=1, shared=3))


def test_pair_search_on_cluster_equals_local_and_brute_force(address):
    """The index's passes run as cluster tasks and give exactly the pairs brute force gives."""
    import numpy as np

    from labelprep.neighbors import radius_pairs

    rng = np.random.default_rng(5)
    base = rng.integers(0, 2**63, size=3000, dtype=np.uint64)
    # planted near pairs: flip up to 8 random bits of some hashes
    flips = np.zeros(600, dtype=np.uint64)
    for k in range(600):
        for bit in rng.choice(64, size=int(rng.integers(0, 9)), replace=False):
            flips[k] |= np.uint64(1) << np.uint64(bit)
    hashes = np.concatenate([base, base[:600] ^ flips])
    remote = radius_pairs(hashes, 8, method="index", cluster=address)
    brute = radius_pairs(hashes, 8, method="brute")
    for a, b in zip(remote, brute):
        assert np.array_equal(a, b)
    assert len(remote[0]) >= 600


def test_unreachable_scheduler_is_an_input_error(monkeypatch):
    monkeypatch.setattr(parallel, "CONNECT_SECONDS", 1)
    # port 9 (discard) on loopback: nothing listens there in the test environment
    with pytest.raises(InputError, match="cannot reach the Dask scheduler at tcp://127.0.0.1:9"):
        list(map_ordered(abs, [1], cluster="tcp://127.0.0.1:9"))


def test_scheduler_without_workers_is_an_input_error(monkeypatch):
    monkeypatch.setattr(parallel, "CONNECT_SECONDS", 1)
    with distributed.LocalCluster(n_workers=0, processes=True, host="127.0.0.1",
                                  dashboard_address=":0") as empty:
        with pytest.raises(InputError, match="has no workers"):
            list(map_ordered(abs, [1], cluster=empty.scheduler_address))


def test_cluster_must_be_an_address():
    with pytest.raises(TypeError, match="scheduler address string"):
        list(map_ordered(abs, [1], cluster=8786))


def test_scan_sends_absolute_paths(class_tree, monkeypatch, address):
    """Workers run in other folders: a relative ROOT must reach them resolved."""
    monkeypatch.chdir(class_tree.parent)
    m = scan(class_tree.name, jobs=1, cluster=address)
    assert (m["fault"] == "").all() and len(m) == 12


# ---------------------------------------------------------------- partitioned Parquet

@pytest.fixture
def scanned(class_tree):
    return scan(class_tree, jobs=1)


def test_partitioned_round_trip_keeps_rows_and_dtypes(scanned, tmp_path):
    target = tmp_path / "m.parquet"
    manifest.write(scanned, target, partitions=5)
    assert [p.name for p in manifest.part_files(target)] == [f"part-0000{k}.parquet" for k in range(5)]
    back = manifest.read(target)
    expected = scanned.drop(columns=list(manifest.CACHE_COLUMNS))
    assert back.drop(columns=list(manifest.CACHE_COLUMNS)).equals(expected)
    assert back["mtime_ns"].equals(scanned["mtime_ns"])  # the scan cache is joined back


def test_partitioned_folder_reads_as_a_parquet_dataset(scanned, tmp_path):
    """Outside readers: pyarrow's dataset reader and dask.dataframe take the folder as it is."""
    import dask.dataframe as dd
    import pyarrow.dataset as ds

    target = tmp_path / "m.parquet"
    manifest.write(scanned, target, partitions=3)
    table = ds.dataset(target, format="parquet").to_table()
    assert table.column("path").to_pylist() == scanned["path"].tolist()
    frame = dd.read_parquet(target)
    assert frame.npartitions == 3
    assert frame.compute()["sha256"].tolist() == scanned["sha256"].tolist()


def test_rewrite_keeps_the_parts_unless_told(scanned, tmp_path):
    target = tmp_path / "m.parquet"
    manifest.write(scanned, target, partitions=4)
    manifest.write(scanned.iloc[:5], target)  # a stage writing back keeps the layout
    assert len(manifest.part_files(target)) == 4 and len(manifest.read(target)) == 5
    manifest.write(scanned, target, partitions=2)
    assert len(manifest.part_files(target)) == 2 and len(manifest.read(target)) == len(scanned)
    # no temporary or set-aside folder is left behind
    assert sorted(p.name for p in tmp_path.glob("*m.parquet*")) == [
        "m.parquet", "m.parquet.meta.json", "m.parquet.scan-cache"]


def test_a_foreign_folder_is_never_replaced(scanned, tmp_path):
    target = tmp_path / "data.parquet"
    target.mkdir()
    (target / "mine.txt").write_text("keep me")
    with pytest.raises(OutputExistsError, match="not a partitioned manifest"):
        manifest.write(scanned, target, partitions=2, force=True)
    assert (target / "mine.txt").read_text() == "keep me"


@pytest.mark.parametrize("partitions, name, error", [
    (0, "m.parquet", ParameterError), (2, "m.csv", ParameterError), (True, "m.parquet", TypeError),
])
def test_partitions_are_validated(scanned, tmp_path, partitions, name, error):
    with pytest.raises(error, match="partitions"):
        manifest.write(scanned, tmp_path / name, partitions=partitions)


def test_scan_cli_partitions_and_stage_commands(class_tree, tmp_path, runner):
    target = tmp_path / "m.parquet"
    args = ["scan", str(class_tree), "-o", str(target), "--partitions", "3", "-j", "1", "-q"]
    assert runner.invoke(main, args).exit_code == 0
    assert runner.invoke(main, ["group", str(target), "-q"]).exit_code == 0
    assert len(manifest.part_files(target)) == 3
    assert "dup_group" in manifest.read(target).columns
    # a rescan finds the partitioned manifest and decodes nothing again
    assert runner.invoke(main, args).exit_code == 0
    assert manifest.read_sidecar(target)["stages"]["scan"]["result"]["reused"] == 12


def test_a_plain_folder_is_not_read_as_a_manifest(tmp_path):
    (tmp_path / "m.parquet").mkdir()
    (tmp_path / "m.parquet" / "other.csv").write_text("path\na.jpg\n")
    with pytest.raises(InputError, match="not a partitioned manifest"):
        manifest.read(tmp_path / "m.parquet")


def test_scan_cli_refuses_partitions_of_a_csv_before_scanning(class_tree, tmp_path, runner):
    result = runner.invoke(main, ["scan", str(class_tree), "-o", str(tmp_path / "m.csv"),
                                  "--partitions", "2", "-q"])
    assert result.exit_code == 2 and "needs a .parquet manifest name" in result.output
    assert not (tmp_path / "m.csv.scan-journal").exists()  # refused before any file was read


def test_keep_from_reads_a_partitioned_manifest(runner, class_tree, tmp_path):
    """--keep-from takes any manifest a command reads, a folder of part files too (README)."""
    from labelprep.splits import split

    old = tmp_path / "old.parquet"
    first = split(scan(class_tree, jobs=1))
    manifest.write(first, old, partitions=2)
    result = runner.invoke(main, ["prepare", str(class_tree), "--out", str(tmp_path / "out"), "--jobs", "1",
                                  "--keep-from", str(old), "-q"])
    assert result.exit_code == 0, result.output
    again = manifest.read(tmp_path / "out" / "manifest.csv").set_index("path")["split"]
    assert again.reindex(first["path"]).tolist() == first["split"].tolist()
