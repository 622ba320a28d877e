"""Tests of labelprep.exports: the exported tree checked file by file against the manifest."""

from __future__ import annotations

import csv
import errno
import hashlib
import io
import os
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from PIL import Image

from labelprep.errors import InputError, OutputExistsError, ParameterError
from labelprep.exports import export, plan_targets, strip_location

GPS_IFD = 0x8825   # Exif 2.32 (CIPA DC-008), table 14: GPS Info IFD pointer
MODEL_TAG = 0x0110  # TIFF 6.0, section 8: Model


def _sha(path) -> str:
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def _image(path: Path, seed: int, *, fmt=None, exif=None, size=(24, 18)) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    pixels = np.random.default_rng(seed).integers(0, 255, (size[1], size[0], 3), dtype=np.uint8)
    kwargs = {"exif": exif} if exif is not None else {}
    Image.fromarray(pixels).save(path, fmt, **kwargs)
    return path


def _manifest(root: Path, rows) -> pd.DataFrame:
    """``(path, label, split)`` rows of files under root, with their real digests."""
    frame = pd.DataFrame(rows, columns=["path", "label", "split"])
    frame["sha256"] = [_sha(root / p) for p in frame["path"]]
    return frame


@pytest.fixture
def dataset(tmp_path):
    """Seven images in class folders (two sharing a file name), one left out of the split."""
    root = tmp_path / "root"
    rows = [("cat/a.png", "cat", "train"), ("cat/b.png", "cat", "train"), ("cat/c.png", "cat", "val"),
            ("dog/a.png", "dog", "train"), ("dog/d.png", "dog", "test"),
            ("more/cats/a.png", "cat", "train"), ("dog/bad.png", "dog", "")]
    for i, (path, _, _) in enumerate(rows):
        _image(root / path, i)
    return root, _manifest(root, rows)


def _tree(dest: Path) -> dict:
    """Every non-folder entry under dest: relative POSIX path -> absolute path."""
    found = {}
    for folder, _, files in os.walk(dest):
        for name in files:
            full = Path(folder) / name
            found[full.relative_to(dest).as_posix()] = full
    return found


def _check_tree(dest: Path, root: Path, manifest: pd.DataFrame, table: pd.DataFrame) -> None:
    """Invariant shared by every mode: the tree holds exactly the split rows, each with its bytes,
    and each split's list names exactly its files (read with Python's csv module, RFC 4180)."""
    placed = manifest[manifest["split"] != ""]
    assert sorted(table["path"]) == sorted(placed["path"])
    expected = {}
    for row in table.itertuples():
        source = manifest.set_index("path").loc[row.path]
        assert row.target.split("/")[:2] == [source["split"], source["label"]]
        assert _sha(dest / row.target) == source["sha256"] == row.sha256
        assert row.bytes == (root / row.path).stat().st_size
        expected[row.target] = row.label
    lists, links = {}, {}
    for split in placed["split"].unique():
        with open(dest / f"{split}.csv", newline="", encoding="utf-8") as fh:
            reader = csv.DictReader(fh)
            assert reader.fieldnames == ["path", "label", "source"]
            for r in reader:
                lists[r["path"]] = r["label"]
                links[r["path"]] = r["source"]
    assert lists == expected
    assert links == dict(zip(table["target"], table["path"]))  # each exported file names its source
    classes = (dest / "classes.txt").read_text(encoding="utf-8").splitlines()
    assert classes == sorted(set(placed["label"]))
    assert set(_tree(dest)) == set(expected) | {f"{s}.csv" for s in placed["split"].unique()} | {"classes.txt"}


class TestExport:
    @pytest.mark.parametrize("mode", ["hardlink", "symlink", "copy"])
    def test_tree_matches_manifest(self, dataset, tmp_path, mode):
        """Each mode places every split file at split/label/name with the manifest's digest."""
        root, manifest = dataset
        dest = tmp_path / "out"
        table = export(manifest, dest, root=root, mode=mode)
        _check_tree(dest, root, manifest, table)
        assert set(table["method"]) == {mode}
        for row in table.itertuples():
            target, source = dest / row.target, root / row.path
            if mode == "hardlink":
                assert os.stat(target).st_ino == os.stat(source).st_ino
            elif mode == "symlink":
                assert os.readlink(target) == str(source.resolve())
            else:
                assert not target.is_symlink() and os.stat(target).st_ino != os.stat(source).st_ino

    def test_sources_untouched(self, dataset, tmp_path):
        """Sources keep their bytes and times, whatever is exported."""
        root, manifest = dataset
        before = {p: (_sha(root / p), os.stat(root / p).st_mtime_ns) for p in manifest["path"]}
        export(manifest, tmp_path / "a", root=root, mode="copy")
        export(manifest, tmp_path / "a", root=root, mode="hardlink", force=True)
        assert before == {p: (_sha(root / p), os.stat(root / p).st_mtime_ns) for p in manifest["path"]}

    def test_collisions_renamed_deterministically(self, dataset, tmp_path):
        """Two train/cat files named a.png both get a path-derived tag; the names repeat on a re-export."""
        root, manifest = dataset
        first = export(manifest, tmp_path / "one", root=root, mode="copy")
        second = export(manifest.iloc[::-1], tmp_path / "two", root=root, mode="copy")
        pd.testing.assert_frame_equal(first, second)
        cats = first[(first["split"] == "train") & (first["label"] == "cat")]
        tag = hashlib.sha256(b"more/cats/a.png").hexdigest()[:8]
        assert sorted(cats["target"]) == sorted(["train/cat/b.png", f"train/cat/a~{tag}.png",
                                                 f"train/cat/a~{hashlib.sha256(b'cat/a.png').hexdigest()[:8]}.png"])
        assert cats.set_index("target")["renamed"].to_dict()["train/cat/b.png"] == np.False_
        dog = first[first["path"] == "dog/a.png"]
        assert dog["target"].tolist() == ["train/dog/a.png"] and not dog["renamed"].any()

    def test_case_only_collision(self, tmp_path):
        """A.png and a.png in one folder are renamed, so the tree unpacks on case-insensitive disks."""
        root = tmp_path / "root"
        _image(root / "x" / "A.png", 1)
        _image(root / "y" / "a.png", 2)
        m = _manifest(root, [("x/A.png", "k", "train"), ("y/a.png", "k", "train")])
        names = plan_targets(m)["target"].str.casefold()
        assert names.is_unique and plan_targets(m)["renamed"].all()

    def test_refuses_non_empty_dest(self, dataset, tmp_path):
        """A non-empty dest is refused without force, and nothing is written into it."""
        root, manifest = dataset
        dest = tmp_path / "out"
        dest.mkdir()
        (dest / "mine.txt").write_text("keep")
        with pytest.raises(OutputExistsError, match="not empty"):
            export(manifest, dest, root=root)
        assert [p.name for p in dest.iterdir()] == ["mine.txt"]

    def test_force_deletes_only_inside_dest(self, dataset, tmp_path):
        """force clears the earlier export's entries; other files in dest and what a symlink in it
        points to stay."""
        root, manifest = dataset
        dest = tmp_path / "out"
        export(manifest, dest, root=root, mode="copy")
        (dest / "train" / "stale.png").write_bytes(b"old")
        (dest / "mine.txt").write_text("keep")
        outside = tmp_path / "elsewhere"
        outside.mkdir()
        (outside / "precious.txt").write_text("keep")
        shutil.rmtree(dest / "val")
        os.symlink(outside, dest / "val")  # force must unlink this link, not empty its target
        table = export(manifest, dest, root=root, mode="copy", force=True)
        assert (outside / "precious.txt").read_text() == "keep"
        assert (dest / "mine.txt").read_text() == "keep"
        assert not (dest / "train" / "stale.png").exists()
        assert not (dest / "val").is_symlink()
        placed = _tree(dest)
        placed.pop("mine.txt")
        assert set(placed) == set(table["target"]) | {"train.csv", "val.csv", "test.csv", "classes.txt"}

    def test_dest_holding_sources_refused(self, dataset):
        """Exporting into the scanned folder is refused: force there could delete sources."""
        root, manifest = dataset
        with pytest.raises(ParameterError, match="holds source files"):
            export(manifest, root, root=root, force=True)
        with pytest.raises(ParameterError, match="holds source files"):
            export(manifest, root / "cat", root=root, force=True)

    def test_hardlink_falls_back_to_copy(self, dataset, tmp_path, monkeypatch):
        """Where os.link fails with EXDEV (another filesystem) the file is copied and verified."""
        root, manifest = dataset

        def no_link(src, dst, *args, **kwargs):
            raise OSError(errno.EXDEV, "Invalid cross-device link")

        monkeypatch.setattr(os, "link", no_link)
        dest = tmp_path / "out"
        table = export(manifest, dest, root=root, mode="hardlink")
        assert set(table["method"]) == {"copy"}
        _check_tree(dest, root, manifest, table)

    def test_hardlink_across_real_filesystems(self, dataset):
        """A real second filesystem (/dev/shm, a tmpfs) gets copies instead of links."""
        root, manifest = dataset
        shm = Path("/dev/shm")
        if not shm.is_dir() or os.stat(shm).st_dev == os.stat(root).st_dev:
            pytest.skip("no second filesystem at /dev/shm on this machine")
        import tempfile

        with tempfile.TemporaryDirectory(dir=shm) as other:
            dest = Path(other) / "out"
            table = export(manifest, dest, root=root, mode="hardlink")
            assert set(table["method"]) == {"copy"}
            _check_tree(dest, root, manifest, table)

    def test_changed_source_left_out(self, dataset, tmp_path):
        """A source whose digest no longer matches is not exported; the rest are, then an error."""
        root, manifest = dataset
        _image(root / "cat/b.png", 99)  # rewritten after the "scan"
        dest = tmp_path / "out"
        with pytest.raises(InputError, match=r"1 of 6 files were not exported; first: cat/b.png: its SHA-256"):
            export(manifest, dest, root=root, mode="copy")
        assert not (dest / "train/cat/b.png").exists()
        assert "train/cat/b.png" not in (dest / "train.csv").read_text()
        assert not [p for p in _tree(dest) if p.endswith(".part")]

    def test_labels_become_safe_folder_names(self, tmp_path):
        """A label with a slash becomes one folder; '..' is refused, so nothing escapes dest."""
        root = tmp_path / "root"
        _image(root / "a.png", 1)
        m = _manifest(root, [("a.png", "birds/owl", "train")])
        assert plan_targets(m)["target"].tolist() == ["train/birds_owl/a.png"]
        with pytest.raises(InputError, match=r"label '\.\.' cannot be a folder name"):
            export(m.assign(label=".."), tmp_path / "out", root=root)
        two = pd.concat([m, m.assign(label="birds_owl", path="b.png")])
        with pytest.raises(InputError, match="would share one folder"):
            plan_targets(two)

    def test_tag_clash_resolved_with_longer_tags(self, tmp_path):
        """A file whose own name equals another's tagged name forces longer tags; names stay unique."""
        tag = hashlib.sha256(b"b/x.jpg").hexdigest()[:8]
        m = pd.DataFrame({"path": ["a/x.jpg", "b/x.jpg", f"c/x~{tag}.jpg"], "label": ["k"] * 3,
                          "split": ["train"] * 3, "sha256": [""] * 3})
        plan = plan_targets(m)
        assert plan["target"].str.casefold().is_unique and plan["renamed"].all()
        assert f"train/k/x~{hashlib.sha256(b'b/x.jpg').hexdigest()[:16]}.jpg" in set(plan["target"])

    def test_progress_wraps_the_loop(self, dataset, tmp_path):
        """The progress callable sees every exported file once."""
        root, manifest = dataset
        seen = []

        def progress(iterable, *, total=None, label=""):
            seen.append(total)
            for item in iterable:
                seen.append(item.path)
                yield item

        export(manifest, tmp_path / "out", root=root, progress=progress)
        assert seen[0] == 6 and sorted(seen[1:]) == sorted(manifest.loc[manifest["split"] != "", "path"])

    @pytest.mark.parametrize("kwargs, error, match", [
        ({"mode": "move"}, ParameterError, "mode='move'"),
        ({"mode": "hardlink", "strip_metadata": True}, ParameterError, "strip_metadata needs mode='copy'"),
        ({"force": "yes"}, TypeError, "force must be True or False"),
        ({"root": 5}, TypeError, "root must be a path"),
    ])
    def test_bad_parameters(self, dataset, tmp_path, kwargs, error, match):
        """Bad options are refused before anything is written."""
        root, manifest = dataset
        with pytest.raises(error, match=match):
            export(manifest, tmp_path / "out", **{"root": root, **kwargs})
        assert not (tmp_path / "out").exists()


def _gps_exif() -> Image.Exif:
    exif = Image.Exif()
    exif[MODEL_TAG] = "Test camera"
    exif[GPS_IFD] = {1: "N", 2: (52.0, 31.0, 12.0), 3: "E", 4: (13.0, 24.0, 0.0)}
    return exif


def _jpeg_segments(data: bytes) -> tuple[dict, bytes]:
    """Marker segments before the scan, and the bytes from start-of-scan on (ITU-T T.81, B.1.1)."""
    assert data[:2] == b"\xff\xd8"
    segments, i = {}, 2
    while data[i + 1] != 0xDA:
        length = int.from_bytes(data[i + 2:i + 4], "big")
        segments.setdefault(data[i + 1], []).append(data[i + 4:i + 2 + length])
        i += 2 + length
    return segments, data[i:]


def _ifd0_tags(tiff: bytes) -> set:
    """Tag numbers of a TIFF header's first IFD (TIFF 6.0, section 2: header, IFD entries of 12 bytes)."""
    order = {b"II": "little", b"MM": "big"}[tiff[:2]]
    offset = int.from_bytes(tiff[4:8], order)
    count = int.from_bytes(tiff[offset:offset + 2], order)
    return {int.from_bytes(tiff[offset + 2 + 12 * k:offset + 4 + 12 * k], order) for k in range(count)}


class TestStripMetadata:
    def test_jpeg_gps_removed_by_the_spec(self, tmp_path):
        """The copy's Exif IFD0 has no GPS pointer, keeps Model, and its scan data is byte-identical."""
        root = tmp_path / "root"
        _image(root / "k/geo.jpg", 1, exif=_gps_exif(), size=(64, 48))
        m = _manifest(root, [("k/geo.jpg", "k", "train")])
        assert GPS_IFD in _ifd0_tags(_jpeg_segments((root / "k/geo.jpg").read_bytes())[0][0xE1][0][6:])
        table = export(m, tmp_path / "out", root=root, mode="copy", strip_metadata=True)
        copy = (tmp_path / "out/train/k/geo.jpg").read_bytes()
        segments, scan = _jpeg_segments(copy)
        tags = _ifd0_tags(segments[0xE1][0][6:])
        assert GPS_IFD not in tags and MODEL_TAG in tags
        assert scan == _jpeg_segments((root / "k/geo.jpg").read_bytes())[1]
        assert table["gps_removed"].tolist() == [True]
        assert table["sha256"].tolist() == [hashlib.sha256(copy).hexdigest()]
        assert _sha(root / "k/geo.jpg") == m["sha256"].iloc[0]  # the source is unchanged

    @pytest.mark.parametrize("fmt, name", [("PNG", "geo.png"), ("WEBP", "geo.webp")])
    def test_png_and_webp(self, tmp_path, fmt, name):
        """PNG eXIf and WebP EXIF chunks lose the GPS block; Pillow decodes the same pixels."""
        source = _image(tmp_path / name, 2, fmt=fmt, exif=_gps_exif())
        if fmt == "WEBP":  # lossless, so that "same pixels" is a fair check
            pixels = np.asarray(Image.open(source))
            Image.fromarray(pixels).save(source, "WEBP", lossless=True, exif=_gps_exif())
        data = source.read_bytes()
        with Image.open(io.BytesIO(data)) as im:
            assert GPS_IFD in im.getexif()
        out, removed = strip_location(data)
        assert removed
        with Image.open(io.BytesIO(out)) as im, Image.open(source) as original:
            assert GPS_IFD not in im.getexif() and im.getexif()[MODEL_TAG] == "Test camera"
            np.testing.assert_array_equal(np.asarray(im), np.asarray(original))

    def test_file_without_location_copied_as_is(self, tmp_path):
        """With nothing to remove the copy is byte-identical to its source."""
        root = tmp_path / "root"
        _image(root / "k/plain.jpg", 3)
        m = _manifest(root, [("k/plain.jpg", "k", "val")])
        table = export(m, tmp_path / "out", root=root, mode="copy", strip_metadata=True)
        assert table["gps_removed"].tolist() == [False]
        assert _sha(tmp_path / "out/val/k/plain.jpg") == m["sha256"].iloc[0]

    def test_unsupported_format_with_gps_left_out(self, tmp_path):
        """A TIFF with GPS tags cannot be rewritten losslessly here: it is named, not exported."""
        root = tmp_path / "root"
        _image(root / "k/geo.tif", 4, fmt="TIFF", exif=_gps_exif().tobytes())  # TIFF writer wants bytes
        _image(root / "k/ok.png", 5)
        m = _manifest(root, [("k/geo.tif", "k", "train"), ("k/ok.png", "k", "train")])
        with pytest.raises(InputError, match="k/geo.tif: strip_metadata cannot remove location data from TIFF"):
            export(m, tmp_path / "out", root=root, mode="copy", strip_metadata=True)
        assert sorted(_tree(tmp_path / "out")) == ["classes.txt", "train.csv", "train/k/ok.png"]


class TestCommand:
    def test_export_command(self, dataset, tmp_path):
        """`labelprep export MANIFEST DEST` finds root in the sidecar, writes the tree, says what it did."""
        from click.testing import CliRunner

        from labelprep import manifest as manifest_io
        from labelprep.cli import main

        root, m = dataset
        path = manifest_io.write(m, tmp_path / "m.csv", meta={"root": str(root)})
        result = CliRunner().invoke(main, ["export", str(path), str(tmp_path / "out"), "--mode", "copy"])
        assert result.exit_code == 0, result.output
        assert "6 files placed under" in result.output and "6 copy" in result.output
        assert sorted(p for p in _tree(tmp_path / "out") if not p.endswith((".csv", ".txt"))) == sorted(
            plan_targets(m)["target"])
        again = CliRunner().invoke(main, ["export", str(path), str(tmp_path / "out")])
        assert again.exit_code == 2 and "not empty" in again.output
