"""The manifest: column registry, exact round trips, atomic writes, the sidecar, output guards."""

from __future__ import annotations

import pandas as pd
import pytest

from labelprep import manifest
from labelprep.errors import InputError, OutputExistsError


def _sample():
    return manifest.coerce(pd.DataFrame({
        "path": ["a/x.jpg", "b/y, z.png", 'c/"q".gif', "d/ü\nnew.jpg"],
        "label": ["a", "b", "", "d"],
        "group": ["", "s1", "s1", ""],
        "bytes": [10, 20, None, 0],
        "width": [4, None, 3, 2],
        "height": [5, None, 3, 2],
        "format": ["jpeg", "", "gif", "jpeg"],
        "sha256": ["0" * 64] * 4,
        "phash": ["00ff00ff00ff00ff", "", "", "ffffffffffffffff"],
        "issues": ["", "not-image", "too-small;wrong-extension", ""],
        "has_gps": [True, None, False, False],
        "spread": [1.25, None, 0.0, 33.3333],
    }))


class TestColumns:
    def test_core_columns_are_the_design_set(self):
        """The core columns keep the names and order users script against."""
        assert manifest.CORE_COLUMNS == ("path", "label", "group", "bytes", "width", "height",
                                         "format", "sha256", "phash", "issues", "dup_group", "split")
        assert all(c in manifest.COLUMNS for c in manifest.CORE_COLUMNS)

    def test_unknown_columns_go_last_sorted(self):
        """User columns are kept, after the registered ones, in sorted order."""
        df = manifest.coerce(pd.DataFrame({"zeta": [1], "path": ["p"], "alpha": [2], "label": ["x"]}))
        assert list(df.columns) == ["path", "label", "alpha", "zeta"]


class TestRoundTrip:
    def test_csv_round_trip_is_exact(self, tmp_path):
        """Quotes, commas, newlines and missing values survive a CSV write and read."""
        df = _sample()
        out = manifest.write(df, tmp_path / "m.csv")
        back = manifest.read(out)
        pd.testing.assert_frame_equal(back, df)
        assert manifest.to_csv_bytes(back) == out.read_bytes()

    def test_parquet_round_trip_is_exact(self, tmp_path):
        """A .parquet name selects Parquet, with the same dtypes back."""
        pytest.importorskip("pyarrow")
        df = _sample()
        back = manifest.read(manifest.write(df, tmp_path / "m.parquet"))
        pd.testing.assert_frame_equal(back, df)

    def test_non_utf8_names_round_trip(self, tmp_path):
        """A file name that is not UTF-8 (surrogate-escaped by os.fsdecode) is written and read back."""
        name = b"raw-\xff.jpg".decode("utf-8", "surrogateescape")
        df = manifest.coerce(pd.DataFrame({"path": pd.Series([name], dtype=object), "label": ["x"]}))
        back = manifest.read(manifest.write(df, tmp_path / "m.csv"))
        assert back.loc[0, "path"] == name


class TestWriting:
    def test_sidecar_records_version_and_merges_stages(self, tmp_path):
        """Each stage's options land under its own key; earlier stages are kept."""
        target = tmp_path / "m.csv"
        manifest.write(_sample(), target, meta={"seed": 3, "stages": {"scan": {"options": {"a": 1}}}})
        manifest.write(_sample(), target, meta={"stages": {"check": {"options": {"min_side": 32}}}})
        side = manifest.read_sidecar(target)
        assert side["tool"] == "labelprep" and side["version"]
        assert side["seed"] == 3
        assert side["stages"]["scan"]["options"] == {"a": 1}
        assert side["stages"]["check"]["options"] == {"min_side": 32}

    def test_refuses_to_replace_a_foreign_file(self, tmp_path):
        """A file labelprep did not write is never replaced without force."""
        target = tmp_path / "notes.csv"
        target.write_text("name,score\nx,1\n")
        with pytest.raises(OutputExistsError, match="labelprep did not write it"):
            manifest.write(_sample(), target)
        assert target.read_text() == "name,score\nx,1\n"
        manifest.write(_sample(), target, force=True)
        assert manifest.read(target).shape[0] == 4

    def test_failed_write_keeps_old_file_and_leaves_no_temp(self, tmp_path, monkeypatch):
        """An error mid-write leaves the previous manifest as it was and removes the temp file."""
        target = manifest.write(_sample(), tmp_path / "m.csv")
        before = target.read_bytes()

        def boom(self, data):
            raise OSError(28, "No space left on device")

        monkeypatch.setattr("pathlib.Path.write_bytes", boom)
        with pytest.raises(InputError, match="No space left"):
            manifest.write(_sample().head(1), target)
        monkeypatch.undo()
        assert target.read_bytes() == before
        assert sorted(p.name for p in tmp_path.iterdir()) == ["m.csv", "m.csv.meta.json"]

    def test_missing_folder_is_a_clear_error(self, tmp_path):
        with pytest.raises(InputError, match="does not exist"):
            manifest.write(_sample(), tmp_path / "nope" / "m.csv")

    def test_read_rejects_a_table_without_path(self, tmp_path):
        (tmp_path / "t.csv").write_text("a,b\n1,2\n")
        with pytest.raises(InputError, match="no 'path' column"):
            manifest.read(tmp_path / "t.csv")


def test_outputs_get_the_umask_mode_without_the_umask_being_set(tmp_path):
    """POSIX open(2): a file created with mode 0666 gets 0666 & ~umask. Run in a child with umask
    027 so that the expected mode (0640) differs from the usual default; os.umask must never be
    called (setting it, even for a moment, races with a host program's threads)."""
    import subprocess
    import sys

    code = ("import os, sys\n"
            "os.umask(0o027)\n"
            "def refuse(*a): raise SystemExit('os.umask called')\n"
            "os.umask = refuse\n"
            "from labelprep import manifest\n"
            "import pandas as pd\n"
            "manifest.write_text(sys.argv[1] + '/r.txt', 'x')\n"
            "manifest.write(pd.DataFrame({'path': ['a.png'], 'sha256': ['']}), sys.argv[1] + '/m.csv')\n")
    run = subprocess.run([sys.executable, "-c", code, str(tmp_path)], capture_output=True, text=True)
    assert run.returncode == 0, run.stderr
    for name in ("r.txt", "m.csv"):
        assert (tmp_path / name).stat().st_mode & 0o777 == 0o640
    assert [p.name for p in tmp_path.iterdir() if p.name.endswith(".tmp")] == []


def test_an_interrupted_first_write_leaves_nothing_a_rerun_refuses(tmp_path, monkeypatch):
    """Ctrl-C while the manifest is written: the rerun must not find a manifest without the
    sidecar that marks it as labelprep's (it would refuse to replace it without --force)."""
    target = tmp_path / "m.csv"

    def interrupted(*args, **kwargs):
        raise KeyboardInterrupt

    with monkeypatch.context() as mp:
        mp.setattr(manifest, "write_sidecar", interrupted)
        with pytest.raises(KeyboardInterrupt):
            manifest.write(_sample(), target)
    assert not target.exists() or manifest.sidecar_path(target).exists()
    manifest.write(_sample(), target)
    assert manifest.read(target)["path"].tolist() == _sample()["path"].tolist()


def test_a_failed_rewrite_changes_nothing(tmp_path, monkeypatch):
    """The sidecar goes first, so a manifest is never without one; if the manifest itself then
    fails (a full disk, Ctrl-C), the old sidecar is put back: manifest and sidecar as they were."""
    target = tmp_path / "m.csv"
    manifest.write(_sample(), target, meta={"seed": 1})
    before = {p.name: p.read_bytes() for p in tmp_path.iterdir()}

    def interrupted(df):
        raise KeyboardInterrupt

    with monkeypatch.context() as mp:
        mp.setattr(manifest, "to_csv_bytes", interrupted)
        with pytest.raises(KeyboardInterrupt):
            manifest.write(_sample().head(2), target, meta={"seed": 2}, new_sidecar=True)
    assert {p.name: p.read_bytes() for p in tmp_path.iterdir()} == before
