"""The scan stage's speed path: reduced-scale decoding that still sees truncation, a fast-path
hash close to the full-decode hash on real photos, deterministic parallel scans, incremental
rescans from an earlier manifest, and a crash-safe journal that lets an interrupted scan resume."""

from __future__ import annotations

import io
import json
import os
import shutil
from pathlib import Path

import imagehash
import numpy as np
import pytest
from PIL import Image, JpegImagePlugin

from conftest import encode, textured
import labelprep
from labelprep import formats, manifest
from labelprep.cli import main
from labelprep.errors import OutputExistsError
from labelprep.probe import HASH_SIDE, _reduce, draft_for_hashing, probe
from labelprep.scanner import FACTS, journal_path, previous_manifest, scan, scan_to


def _stop_after(k):
    """A progress callable that interrupts the scan after handing out ``k`` results."""
    def progress(iterable, *, total=None, label=""):
        for i, item in enumerate(iterable):
            if i == k:
                raise KeyboardInterrupt
            yield item
    return progress


def _csv(df) -> bytes:
    return manifest.to_csv_bytes(df)


@pytest.fixture(scope="module")
def big_jpeg():
    """A 1024x768 JPEG: large enough that draft mode decodes it at 1/4 scale."""
    return encode(textured((1024, 768), seed=3), "JPEG", quality=90)


@pytest.fixture(scope="module")
def mixed_source(tmp_path_factory):
    """Every format the probe decodes, plus a truncated JPEG and a file that is not an image."""
    root = tmp_path_factory.mktemp("mixed")
    for k, (fmt, ext) in enumerate([("JPEG", "jpg"), ("PNG", "png"), ("GIF", "gif"), ("WEBP", "webp"),
                                    ("BMP", "bmp"), ("TIFF", "tif")]):
        for folder, size, seed in (("a", (320, 240), k), ("b", (80, 60), 10 + k)):
            (root / folder).mkdir(exist_ok=True)
            (root / folder / f"{k}.{ext}").write_bytes(encode(textured(size, seed), fmt))
    whole = (root / "a" / "0.jpg").read_bytes()
    (root / "b" / "cut.jpg").write_bytes(whole[: len(whole) // 2])
    (root / "b" / "notes.txt").write_text("not an image")
    return root


@pytest.fixture
def mixed_tree(mixed_source, tmp_path):
    """A private copy of the mixed tree, which a test may change."""
    return Path(shutil.copytree(mixed_source, tmp_path / "mixed"))


class TestDraftDecoding:
    @pytest.mark.parametrize("progressive", [False, True])
    @pytest.mark.parametrize("keep", [0.3, 0.7, 0.99])
    def test_pillow_still_raises_on_truncation_in_draft_mode(self, big_jpeg, progressive, keep):
        """Draft mode scales the IDCT but the decoder still consumes the whole entropy-coded stream,
        so a cut file raises. Source: Pillow's ImageFile.load raises OSError "image file is
        truncated" unless ImageFile.LOAD_TRUNCATED_IMAGES is set (Pillow reference, ImageFile)."""
        data = big_jpeg if not progressive else encode(Image.open(io.BytesIO(big_jpeg)), "JPEG",
                                                       quality=90, progressive=True)
        im = Image.open(io.BytesIO(data[: int(len(data) * keep)]))
        draft_for_hashing(im)
        assert im.size == (256, 192)  # the scale really changed: 1/4 of 1024x768
        with pytest.raises(OSError, match="image file is truncated"):
            im.load()

    @pytest.mark.parametrize("keep", [0.3, 0.7, 0.99])
    @pytest.mark.parametrize("structure_check", [True, False])
    def test_probe_reports_truncated_jpeg_decoded_in_draft_mode(self, tmp_path, big_jpeg, keep,
                                                                 structure_check, monkeypatch):
        """Caught by the structure check, and by the draft decode alone when that check is off."""
        if not structure_check:
            monkeypatch.setattr(formats, "damage", lambda fmt, data: ("", ""))
        path = tmp_path / "cut.jpg"
        path.write_bytes(big_jpeg[: int(len(big_jpeg) * keep)])
        facts = probe(path)
        assert facts["fault"] == "truncated"
        assert (facts["width"], facts["height"]) == (1024, 768)  # from the header, full size

    def test_probe_decodes_jpeg_at_reduced_scale(self, tmp_path, big_jpeg, monkeypatch):
        """The probe asks for the smallest DCT scale whose shorter side is still >= HASH_SIDE."""
        seen = []
        original = JpegImagePlugin.JpegImageFile.draft

        def spy(self, mode, size):
            result = original(self, mode, size)
            seen.append((self.size, self.mode))
            return result

        monkeypatch.setattr(JpegImagePlugin.JpegImageFile, "draft", spy)
        path = tmp_path / "big.jpg"
        path.write_bytes(big_jpeg)
        facts = probe(path)
        assert facts["fault"] == "" and facts["phash"]
        assert seen == [((256, 192), "L")]  # luminance only: every hash works on gray
        assert HASH_SIDE <= min(seen[0][0]) < 2 * HASH_SIDE

    @pytest.mark.parametrize("mode", ["RGB", "L", "P", "PA", "1", "I;16", "RGBA", "CMYK"])
    def test_reduce_brings_any_mode_near_hash_side(self, mode):
        """Box reduction to a shorter side in [HASH_SIDE, 2 x HASH_SIDE), for every mode."""
        im = textured((700, 540), seed=1, mode="RGB" if mode in ("I;16", "PA") else mode)
        if mode == "I;16":
            im = Image.fromarray((np.asarray(im.convert("L"), dtype=np.uint16) * 257))
        elif mode == "PA":
            im = im.quantize(64, method=Image.Quantize.FASTOCTREE).convert("PA")
        assert im.mode == mode
        small = _reduce(im)
        assert HASH_SIDE <= min(small.size) < 2 * HASH_SIDE

    def test_reduce_averages_colours_not_palette_indices(self):
        """A palette image reduces like its RGB rendering (averaging indices would be noise)."""
        pal = textured((700, 540), seed=2).quantize(64, method=Image.Quantize.FASTOCTREE)
        a = np.asarray(_reduce(pal).convert("RGB"), dtype=float)
        b = np.asarray(_reduce(pal.convert("RGB")), dtype=float)
        assert np.abs(a - b).max() <= 1.0

    def test_small_images_are_not_copied_or_scaled(self):
        im = textured((300, 200), seed=4)
        assert _reduce(im) is im


needs_openjpeg = pytest.mark.skipif(not __import__("PIL.features").features.check("jpg_2000"),
                                    reason="this Pillow has no JPEG 2000 codec (OpenJPEG)")


def _jpeg2000(img, **kwargs) -> bytes:
    buf = io.BytesIO()
    img.save(buf, "JPEG2000", **kwargs)
    return buf.getvalue()


@needs_openjpeg
class TestJpeg2000ReducedDecoding:
    """JPEG 2000 decodes at fewer resolution levels (ISO/IEC 15444-1 annex F), like JPEG draft mode."""

    @pytest.fixture
    def photo(self):
        # scikit-image's bundled coffee photograph, scaled to 2048 x 1600
        import skimage.data

        return Image.fromarray(skimage.data.coffee()).resize((2048, 1600), Image.BICUBIC)

    @pytest.mark.parametrize("kwargs", [{}, {"no_jp2": True}, {"tile_size": (512, 512)}, {"num_resolutions": 2}])
    def test_decoded_small_and_hashed_like_the_full_decode(self, tmp_path, photo, kwargs, monkeypatch):
        """Reference: imagehash.phash of the fully decoded file; the stated bound is the JPEG one."""
        path = tmp_path / "p.jp2"
        path.write_bytes(_jpeg2000(photo, **kwargs))
        from labelprep import hashing

        seen = []
        original = hashing.fingerprint

        def spy(img):
            seen.append(img.size)
            return original(img)

        monkeypatch.setattr(hashing, "fingerprint", spy)
        facts = probe(path)
        assert facts["fault"] == "" and (facts["width"], facts["height"]) == (2048, 1600)
        with Image.open(path) as full:
            reference = imagehash.phash(full)
        assert imagehash.hex_to_hash(facts["phash"]) - reference <= FAST_PATH_MAX_BITS
        # five levels: the decoder drops three (1600 -> 200; a fourth would go under HASH_SIDE);
        # one level: the decoder halves, the box reduction does the rest (800 // 128 = 6)
        assert seen == ([(171, 134)] if "num_resolutions" in kwargs else [(256, 200)])

    def test_more_levels_claimed_than_decodable_falls_back_to_full(self, tmp_path, photo, monkeypatch):
        path = tmp_path / "p.jp2"
        path.write_bytes(_jpeg2000(photo, num_resolutions=2))  # one decomposition level
        monkeypatch.setattr(formats, "jpeg2000_levels", lambda data: 5)
        facts = probe(path)
        assert facts["fault"] == "" and facts["phash"]

    @pytest.mark.parametrize("keep", [0.3, 0.9, 0.99])
    def test_cut_file_is_still_caught(self, tmp_path, photo, keep):
        """The reduced decode still reads the whole codestream: a cut file is not clean."""
        data = _jpeg2000(photo)
        path = tmp_path / "cut.jp2"
        path.write_bytes(data[: int(len(data) * keep)])
        assert probe(path)["fault"] in ("truncated", "unreadable")


def _real_photos():
    """Photographs bundled with scikit-image and scikit-learn (all present offline).

    scikit-learn's two sample photos are read from its package folder (the files behind
    sklearn.datasets.load_sample_images) without importing scikit-learn, which takes seconds.
    """
    import importlib.util

    from skimage import data

    names = ["astronaut", "coffee", "chelsea", "rocket", "camera", "immunohistochemistry",
             "hubble_deep_field", "retina", "moon", "coins", "brick", "grass", "gravel"]
    photos = {name: getattr(data, name)() for name in names}
    images = Path(importlib.util.find_spec("sklearn").submodule_search_locations[0]) / "datasets" / "images"
    for name in ("china", "flower"):
        with Image.open(images / f"{name}.jpg") as im:
            photos[name] = np.asarray(im.convert("RGB"))
    return photos


# Measured on these 15 photos at 1x and 4x scale, JPEG quality 90 (30 files), with HASH_SIDE 128
# and luminance-only decoding: the fast-path pHash equals imagehash.phash of the fully decoded
# file on 22 files and differs by 2 bits on 8 (mean 0.53 bits). A wider sweep (scales 1, 2, 4, 6;
# quality 75 and 95; 120 files) also gave at most 2 bits (mean 0.55); with HASH_SIDE 256 it gave
# at most 4 (mean 0.3). The stated bound is 2 bits, a quarter of the default radius of 8.
FAST_PATH_MAX_BITS = 2
FAST_PATH_MEAN_BITS = 0.75


def test_fast_path_phash_matches_full_decode_on_real_photos(tmp_path):
    """Reference: imagehash.phash on the fully decoded file (the reference implementation)."""
    distances = []
    for name, pixels in _real_photos().items():
        photo = Image.fromarray(pixels)
        for scale in (1, 4):
            big = photo.resize((photo.width * scale, photo.height * scale), Image.BICUBIC)
            path = tmp_path / f"{name}-{scale}.jpg"
            big.save(path, quality=90)
            fast = imagehash.hex_to_hash(probe(path)["phash"])
            with Image.open(path) as full:
                distances.append(fast - imagehash.phash(full))
    assert len(distances) == 30
    assert max(distances) <= FAST_PATH_MAX_BITS
    assert np.mean(distances) <= FAST_PATH_MEAN_BITS


class TestScan:
    def test_parallel_scan_equals_serial_scan(self, mixed_tree):
        """Results are gathered in input order, so the manifest does not depend on --jobs."""
        one = scan(mixed_tree, jobs=1)
        two = scan(mixed_tree, jobs=2)
        assert _csv(one) == _csv(two)
        assert one["path"].tolist() == sorted(one["path"])
        faults = dict(zip(one["path"], one["fault"]))
        assert faults["b/cut.jpg"] == "truncated" and faults["b/notes.txt"] == "not-image"
        assert sum(f == "" for f in faults.values()) == 12

    def test_counts(self, mixed_tree):
        assert scan(mixed_tree, jobs=1, return_facts=True)[1]["probed"] == 14

    @pytest.mark.parametrize("bad", [0, -5, 2.5, True])
    def test_bad_max_pixels(self, mixed_tree, bad):
        with pytest.raises(ValueError, match="max_pixels"):
            scan(mixed_tree, max_pixels=bad)


class TestRescan:
    def test_unchanged_tree_is_not_decoded_again(self, mixed_tree):
        first = scan(mixed_tree, jobs=1)
        again, facts = scan(mixed_tree, jobs=1, previous=first, return_facts=True)
        assert facts["probed"] == 0 and facts["reused"] == 14
        assert _csv(again) == _csv(first)

    def test_round_trip_through_the_written_manifest(self, mixed_tree, tmp_path):
        first = scan(mixed_tree, jobs=1)
        manifest.write(first, tmp_path / "m.csv")
        again, facts = scan(mixed_tree, jobs=1, previous=manifest.read(tmp_path / "m.csv"), return_facts=True)
        assert facts["probed"] == 0
        assert _csv(again) == _csv(first)

    def test_changed_mtime_or_size_is_probed_again(self, mixed_tree, write_image):
        first = scan(mixed_tree, jobs=1)
        st = os.stat(mixed_tree / "a/1.png")
        os.utime(mixed_tree / "a/1.png", ns=(st.st_atime_ns, st.st_mtime_ns + 1_000_000_000))
        write_image(mixed_tree / "a/0.jpg", size=(600, 400), seed=99)  # new content, new size
        write_image(mixed_tree / "c/new.jpg", seed=7)
        again, facts = scan(mixed_tree, jobs=1, previous=first, return_facts=True)
        assert facts["probed"] == 3
        assert _csv(again) == _csv(scan(mixed_tree, jobs=1))

    def test_manifest_missing_a_fact_column_is_not_trusted(self, mixed_tree):
        first = scan(mixed_tree, jobs=1).drop(columns=["spread"])
        assert scan(mixed_tree, jobs=1, previous=first, return_facts=True)[1]["probed"] == 14

    def test_unreadable_rows_are_retried(self, mixed_tree):
        first = scan(mixed_tree, jobs=1)
        first.loc[first["path"] == "a/2.gif", "fault"] = "unreadable"
        assert scan(mixed_tree, jobs=1, previous=first, return_facts=True)[1]["probed"] == 1


class TestPreviousManifest:
    def _written(self, tree, tmp_path, max_pixels=1_000_000):
        out = tmp_path / "m.csv"
        manifest.write(scan(tree, jobs=1, max_pixels=max_pixels), out,
                       meta={"root": str(tree.resolve()), "stages": {"scan": {"options": {"max_pixels": max_pixels}}}})
        return out

    def test_same_root_and_budget(self, mixed_tree, tmp_path):
        out = self._written(mixed_tree, tmp_path)
        assert len(previous_manifest(out, root=mixed_tree, max_pixels=1_000_000)) == 14

    def test_other_budget_or_root_or_version(self, mixed_tree, tmp_path):
        out = self._written(mixed_tree, tmp_path)
        assert previous_manifest(out, root=mixed_tree, max_pixels=2_000_000) is None
        assert previous_manifest(out, root=tmp_path, max_pixels=1_000_000) is None
        side = manifest.sidecar_path(out)
        meta = json.loads(side.read_text())
        side.write_text(json.dumps({**meta, "version": "0.0.0"}))
        assert previous_manifest(out, root=mixed_tree, max_pixels=1_000_000) is None

    def test_missing_or_foreign_file(self, mixed_tree, tmp_path):
        assert previous_manifest(tmp_path / "none.csv", root=mixed_tree) is None


class TestJournal:
    def test_interrupted_scan_resumes_where_it_stopped(self, mixed_tree, tmp_path):
        """Rows probed before an interrupt are on disk; the next scan decodes only the rest."""
        log = tmp_path / "m.csv.scan-journal"
        with pytest.raises(KeyboardInterrupt):
            scan(mixed_tree, jobs=1, journal=log, progress=_stop_after(5))
        lines = log.read_text().splitlines()
        assert len(lines) == 1 + 5  # header + the five rows handed out before the interrupt
        resumed, facts = scan(mixed_tree, jobs=1, journal=log, return_facts=True)
        assert facts["probed"] == 14 - 5
        assert _csv(resumed) == _csv(scan(mixed_tree, jobs=1))
        assert len(log.read_text().splitlines()) == 1 + 14

    def test_torn_last_line_is_ignored_and_closed(self, mixed_tree, tmp_path):
        """A crash mid-write leaves half a line: it is skipped, and the next row starts cleanly."""
        log = tmp_path / "j"
        with pytest.raises(KeyboardInterrupt):
            scan(mixed_tree, jobs=1, journal=log, progress=_stop_after(4))
        whole = log.read_bytes()
        last = whole.rstrip(b"\n").rsplit(b"\n", 1)[1]
        log.write_bytes(whole + last[: len(last) // 2])  # a fifth row, torn
        resumed, facts = scan(mixed_tree, jobs=1, journal=log, return_facts=True)
        assert facts["probed"] == 14 - 4
        rows = log.read_bytes().split(b"\n")
        parsed = [r for r in rows[1:] if r and _parses(r)]
        assert len(parsed) == 14 and len([r for r in rows if r]) == 1 + 14 + 1

    def test_journal_of_other_options_is_discarded(self, mixed_tree, tmp_path):
        log = tmp_path / "j"
        with pytest.raises(KeyboardInterrupt):
            scan(mixed_tree, jobs=1, journal=log, progress=_stop_after(5), max_pixels=10_000)
        again, facts = scan(mixed_tree, jobs=1, journal=log, return_facts=True)
        assert facts["probed"] == 14
        assert json.loads(log.read_text().splitlines()[0])["max_pixels"] != 10_000

    def test_rows_are_journaled_with_every_fact(self, mixed_tree, tmp_path):
        log = tmp_path / "j"
        scan(mixed_tree, jobs=2, journal=log)
        rows = [json.loads(r) for r in log.read_text().splitlines()[1:]]
        assert [r["path"] for r in rows] == sorted(r["path"] for r in rows)
        assert all(set(r) == {"path", *FACTS} for r in rows)


def _parses(line: bytes) -> bool:
    try:
        json.loads(line)
    except ValueError:
        return False
    return True


class TestScanCommand:
    def test_rescan_reports_unchanged_and_leaves_no_journal(self, runner, class_tree, tmp_path):
        out = tmp_path / "m.csv"
        first = runner.invoke(main, ["scan", str(class_tree), "-o", str(out), "--jobs", "1"])
        assert first.exit_code == 0, first.output
        assert not journal_path(out).exists()
        again = runner.invoke(main, ["scan", str(class_tree), "-o", str(out), "--jobs", "1"])
        assert "(0 decoded, 12 unchanged)" in again.output

    def test_command_resumes_from_the_journal(self, runner, class_tree, tmp_path):
        out = tmp_path / "m.csv"
        with pytest.raises(KeyboardInterrupt):
            scan(class_tree, jobs=1, journal=journal_path(out), progress=_stop_after(7))
        result = runner.invoke(main, ["scan", str(class_tree), "-o", str(out), "--jobs", "1"])
        assert "(5 decoded, 7 unchanged)" in result.output
        assert out.read_bytes() == _csv(scan(class_tree, jobs=1))


def test_every_row_has_the_same_fact_columns(mixed_tree):
    """A decoded file's facts have exactly the keys of blank_facts (what a rescan may reuse)."""
    assert set(probe(mixed_tree / "a/0.jpg")) == set(FACTS)


class TestScanTo:
    """The library call behind `labelprep scan`: a Python user gets rescans and resume too."""

    def test_rescan_decodes_nothing_unchanged(self, mixed_tree, tmp_path):
        out = tmp_path / "m.csv"
        first, facts = scan_to(mixed_tree, out, jobs=1)
        assert facts["probed"] == 14 and manifest.read(out).shape == first.shape
        side = manifest.read_sidecar(out)
        assert side["stages"]["scan"]["result"]["probed"] == 14
        manifest.write(labelprep.split(first, seed=4), out, meta={"seed": 4, "stages": {"split": {}}})
        again, facts = scan_to(mixed_tree, out, jobs=1)
        assert facts == {**facts, "probed": 0, "reused": 14}
        # the rows are new: no record of the split they no longer hold, nor its seed
        assert set(manifest.read_sidecar(out)["stages"]) == {"scan"} and "seed" not in manifest.read_sidecar(out)
        assert _csv(again) == _csv(first)

    def test_an_interrupted_run_resumes_and_then_drops_its_journal(self, mixed_tree, tmp_path):
        out = tmp_path / "m.csv"
        with pytest.raises(KeyboardInterrupt):
            scan_to(mixed_tree, out, jobs=1, progress=_stop_after(5))
        assert not out.exists() and journal_path(out).exists()
        resumed, facts = scan_to(mixed_tree, out, jobs=1)
        assert facts["probed"] == 14 - 5 and not journal_path(out).exists()
        assert out.read_bytes() == manifest.to_csv_bytes(resumed)

    def test_options_are_checked_before_any_work(self, mixed_tree, tmp_path):
        with pytest.raises(TypeError, match="min_sid"):
            scan_to(mixed_tree, tmp_path / "m.csv", min_sid=3)
        (tmp_path / "notes.csv").write_text("mine\n")
        with pytest.raises(OutputExistsError):
            scan_to(mixed_tree, tmp_path / "notes.csv", jobs=1)
        assert (tmp_path / "notes.csv").read_text() == "mine\n"
