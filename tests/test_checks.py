"""The check stage on real files: every kind of bad file gets its code and a specific reason."""

from __future__ import annotations

import csv
import io
import re

import numpy as np
import pandas as pd
import pytest
from PIL import Image

from conftest import encode, textured
from labelprep import codes, defaults
from labelprep.checks import RULES, check, limits_of, reason, summary_lines
from labelprep.cli import main
from labelprep.errors import InputError, ParameterError
from labelprep.manifest import read, read_sidecar
from labelprep.probe import probe
from labelprep.scanner import scan
from test_probe import _hand_png, _rgb48_png


def _animated_gif() -> bytes:
    frames = [textured(seed=s).convert("P") for s in range(3)]
    buf = io.BytesIO()
    frames[0].save(buf, "GIF", save_all=True, append_images=frames[1:])
    return buf.getvalue()


def _gps_jpeg() -> bytes:
    exif = Image.Exif()
    exif[0x8825] = {1: "S", 2: (33.0, 51.0, 0.0), 3: "E", 4: (151.0, 12.0, 0.0)}  # EXIF 2.3 GPS IFD
    return encode(textured(seed=9), "JPEG", exif=exif)


def _bad_crc_png() -> bytes:
    data = bytearray(encode(textured(seed=10), "PNG"))
    data[data.find(b"IDAT") + 12] ^= 0x10  # PNG spec 5.3: the chunk's CRC no longer matches
    return bytes(data)


# path -> (bytes, expected code or "" for clean, expected reason or None when free-form)
CASES = {
    "ok/photo.jpg": (encode(textured((96, 64), seed=1)), "", None),
    "ok/photo.png": (encode(textured((64, 64), seed=2), "PNG"), "", None),
    "ok/gray.png": (encode(textured((64, 48), seed=3, mode="L"), "PNG"), "", None),
    "bad/empty.jpg": (b"", "empty-file", "zero bytes"),
    "bad/noise.jpg": (np.random.default_rng(5).bytes(2048), "not-image", None),
    "bad/notes.jpg": (b"pool 7: calm\n", "not-image", "first bytes 70 6f 6f 6c 20 37 3a 20 match no image signature"),
    "bad/cut.jpg": (encode(textured(seed=4))[:700], "truncated", None),
    "bad/crc.png": (_bad_crc_png(), "corrupt", None),
    "bad/bomb.png": (_hand_png(50_000, 50_000), "pixel-limit", None),
    "bad/tiny.jpg": (encode(textured((20, 16), seed=5)), "too-small", "20x16, shorter side under 32 px; a lower --min-side keeps it"),
    "bad/png.jpg": (encode(textured(seed=6), "PNG"), "wrong-extension", "named .jpg but the content is png"),
    "bad/strip.jpg": (encode(textured((400, 100), seed=7)), "extreme-aspect", "400x100, 4.0:1, beyond 3:1"),
    "bad/anim.gif": (_animated_gif(), "multi-frame", "3 frames; loaders read only the first"),
    "bad/cmyk.jpg": (encode(textured(seed=8).convert("CMYK")), "unusual-mode", "CMYK colour (4 ink channels)"),
    "bad/deep.png": (encode(Image.fromarray(np.asarray(textured(seed=8).convert("L"), np.uint16) * 257), "PNG"),
                     "unusual-mode", "16-bit grey samples (I;16)"),
    "bad/rgb48.png": (_rgb48_png(40, 40), "unusual-mode", "16-bit samples, which Pillow reads as 8-bit RGB"),
    "bad/clear.png": (encode(textured(seed=8).convert("RGBA"), "PNG"), "unusual-mode", "alpha channel (RGBA)"),
    "bad/keyed.png": (encode(textured(seed=8).convert("P"), "PNG", transparency=0), "unusual-mode",
                      "palette with a transparent entry"),
    "bad/flat.jpg": (encode(Image.new("RGB", (80, 60), (120, 90, 60))), "near-blank", None),
    "bad/gps.jpg": (_gps_jpeg(), "has-location", "EXIF GPS position present"),
    "loose.jpg": (encode(textured(seed=11)), "no-label", None),
}


@pytest.fixture(scope="module")
def scanned(tmp_path_factory):
    """The CASES tree plus a symbolic link, scanned once (read-only for tests)."""
    root = tmp_path_factory.mktemp("checks") / "photos"
    for rel, (data, _, _) in CASES.items():
        (root / rel).parent.mkdir(parents=True, exist_ok=True)
        (root / rel).write_bytes(data)
    (root / "bad" / "link.jpg").symlink_to(root / "ok" / "photo.jpg")
    return root, scan(root, jobs=1)


@pytest.fixture(scope="module")
def checked(scanned):
    return check(scanned[1]).set_index("path", drop=False)


class TestRegistry:
    """The check stage's rules and the code registry agree."""

    def test_every_check_code_has_a_rule(self):
        """Each registered check code has exactly one rule, and no rule is unregistered."""
        assert sorted(RULES) == sorted(codes.codes_of("check"))

    def test_codes_are_short_hyphenated_with_one_severity(self):
        """Our naming style (DESIGN.md): lowercase words joined by hyphens."""
        for code in RULES:
            assert re.fullmatch(r"[a-z]+(-[a-z]+)*", code) and len(code) <= 16, code
            assert codes.CODES[code].severity in (codes.ERROR, codes.WARNING)


class TestRealFiles:
    """Each bad file in CASES carries exactly its expected check code, with its reason."""

    @pytest.mark.parametrize("rel", sorted(CASES))
    def test_expected_code(self, checked, rel):
        """The file carries its expected code and no other; the reason names the numbers."""
        _, expected, why = CASES[rel]
        row = checked.loc[rel]
        assert codes.parse(row["issues"]) == ([expected] if expected else []), row["fault_detail"]
        if expected and why is not None:
            assert reason(row, expected) == why

    def test_symlink_is_reported_not_followed(self, checked):
        """A symbolic link becomes a row of its own, flagged, never read through."""
        row = checked.loc["bad/link.jpg"]
        assert row["issues"] == "link-skipped" and "not followed" in reason(row, "link-skipped")

    def test_no_row_dropped_and_order_kept(self, scanned, checked):
        """check() only adds codes: same rows, same order."""
        assert checked["path"].tolist() == scanned[1]["path"].tolist()

    def test_errors_and_warnings_split_as_registered(self, checked):
        """Errors keep a row out of the split; warnings (e.g. has-location) do not."""
        left_out = codes.errors_mask(checked["issues"])
        assert left_out["bad/cut.jpg"]
        assert not left_out["bad/gps.jpg"] and not left_out["ok/photo.jpg"]


class TestLimits:
    """Limits are options; a re-run replaces the stage's own codes and keeps the others'."""

    def test_rerun_with_other_limits(self, scanned):
        """Looser limits clear the codes they caused; another stage's code stays."""
        m = check(scanned[1])
        m.loc[m["path"] == "ok/photo.jpg", "issues"] = "exact-copy"  # a group-stage code
        again = check(m, min_side=8, max_aspect=5, min_spread=0).set_index("path")
        assert again.loc["bad/tiny.jpg", "issues"] == ""
        assert again.loc["bad/strip.jpg", "issues"] == ""
        assert again.loc["bad/flat.jpg", "issues"] == ""
        assert again.loc["ok/photo.jpg", "issues"] == "exact-copy"

    def test_smaller_pixel_budget_flags_decoded_images(self, scanned):
        """96 x 64 = 6,144 pixels is over a 5,000-pixel budget; the reason says so."""
        m = check(scanned[1], max_pixels=5000).set_index("path", drop=False)
        assert "pixel-limit" in codes.parse(m.loc["ok/photo.jpg", "issues"])
        assert reason(m.loc["ok/photo.jpg"], "pixel-limit", limits=limits_of(max_pixels=5000)) == \
            "96x64 = 6,144 pixels, over the budget of 5,000"

    @pytest.mark.parametrize("kwargs, message", [
        ({"min_side": 0}, "min_side must be >= 1; got min_side=0"),
        ({"max_pixels": -5}, "max_pixels must be >= 1; got max_pixels=-5"),
        ({"max_aspect": 0.5}, "max_aspect must be >= 1"),
        ({"min_spread": -1.0}, "min_spread must be within 0..255"),
    ])
    def test_bad_values(self, scanned, kwargs, message):
        """A value outside the accepted range raises ParameterError naming it."""
        with pytest.raises(ParameterError, match=re.escape(message)):
            check(scanned[1], **kwargs)

    @pytest.mark.parametrize("kwargs", [{"min_side": "32"}, {"min_side": True}, {"max_aspect": "3"}])
    def test_bad_types(self, scanned, kwargs):
        """A value of the wrong type raises TypeError."""
        with pytest.raises(TypeError, match="must be"):
            check(scanned[1], **kwargs)

    def test_manifest_without_scan_facts(self):
        """A table lacking the scan's fact columns is refused with the missing names."""
        with pytest.raises(InputError, match="has no columns .*'spread'"):
            check(pd.DataFrame({"path": ["a.jpg"], "label": ["a"]}))

    def test_unknown_code_for_reason(self, checked):
        """reason() explains only the check stage's own codes."""
        with pytest.raises(ParameterError, match="near-copy"):
            reason(checked.iloc[0], "near-copy")


class TestBlankThreshold:
    """The near-blank default against real photos and a flat frame."""

    def test_no_scikit_image_photo_is_near_blank(self):
        """Every picture bundled with scikit-image decodes with a spread above the default."""
        from pathlib import Path

        import skimage

        folder = Path(skimage.__file__).parent / "data"
        spreads = {p.name: probe(p)["spread"] for p in folder.iterdir() if p.suffix in (".png", ".jpg", ".gif")}
        decoded = {k: v for k, v in spreads.items() if v is not None}
        assert len(decoded) >= 20
        assert min(decoded.values()) > defaults.MIN_SPREAD, min(decoded.items(), key=lambda kv: kv[1])

    def test_flat_frame_with_sensor_noise_is_near_blank(self, tmp_path):
        """A dark frame with Gaussian noise (sd 2 levels) has almost no spread once thumbnailed."""
        noise = np.random.default_rng(0).normal(12, 2, (240, 320, 3)).clip(0, 255).astype(np.uint8)
        path = tmp_path / "dark.jpg"
        path.write_bytes(encode(Image.fromarray(noise)))
        assert probe(path)["spread"] < defaults.MIN_SPREAD


class TestSummary:
    """summary_lines: per code its severity and count, then up to `examples` files with reasons."""

    def test_lines(self, checked):
        """Counts per code, reasons per file, and a tail line for the files not shown."""
        lines = summary_lines(check(checked.reset_index(drop=True)), examples=1)
        assert "too-small        error         1 file" in lines
        assert "    bad/tiny.jpg: 20x16, shorter side under 32 px; a lower --min-side keeps it" in lines
        assert lines[lines.index("unusual-mode     warning       5 files") + 2] == "    ... and 4 more"

    def test_clean(self, checked):
        """A manifest with no codes says so in one line."""
        clean = check(checked.loc[["ok/photo.jpg"]].reset_index(drop=True))
        assert summary_lines(clean) == ["no issues found"]


class TestDemo:
    """The demo's planted problems are each flagged with the code planted.csv expects."""

    def test_every_planted_problem_found(self, demo_tree):
        """Every planted check-stage problem is found, and no survey photo is flagged."""
        m = check(scan(demo_tree, jobs=1)).set_index("path")
        with open(demo_tree.parent / "planted.csv", encoding="utf-8") as fh:
            planted = list(csv.DictReader(fh))
        check_codes = set(RULES)
        expected = {p["path"]: p["expected_code"] for p in planted if p["expected_code"] in check_codes}
        assert len(expected) >= 15
        for path, code in expected.items():
            assert code in codes.parse(m.loc[path, "issues"]), (path, m.loc[path, "fault_detail"])
        planted_paths = {p["path"] for p in planted}
        unplanted = m[~m.index.isin(planted_paths) & m["issues"].ne("")]
        assert unplanted.empty, unplanted["issues"].to_dict()


class TestCheckCommand:
    """`labelprep check MANIFEST`: output, exit codes, what is written back."""

    @pytest.fixture
    def manifest_path(self, scanned, tmp_path, runner):
        out = tmp_path / "m.csv"
        result = runner.invoke(main, ["scan", str(scanned[0]), "-o", str(out), "-j", "1", "-q"])
        assert result.exit_code == 0, result.output
        return out

    def test_default_never_fails(self, runner, manifest_path):
        """Without --fail-on the command exits 0, prints the codes and writes them back."""
        result = runner.invoke(main, ["check", str(manifest_path)])
        assert result.exit_code == 0, result.output
        assert "too-small        error         1 file" in result.output
        assert "    bad/tiny.jpg: 20x16, shorter side under 32 px; a lower --min-side keeps it" in result.output
        assert read(manifest_path).set_index("path").loc["bad/tiny.jpg", "issues"] == "too-small"

    @pytest.mark.parametrize("fail_on, code", [("error", 1), ("warning", 1), ("never", 0)])
    def test_fail_on(self, runner, manifest_path, fail_on, code):
        """--fail-on error and warning exit 1 naming the failing codes; never exits 0."""
        result = runner.invoke(main, ["check", str(manifest_path), "--fail-on", fail_on])
        assert result.exit_code == code
        if code:
            assert f"--fail-on {fail_on}: empty-file (1)" in result.output

    def test_warnings_only(self, runner, manifest_path):
        """With only warning rows left, --fail-on error passes and --fail-on warning fails."""
        m = read(manifest_path)
        keep = m["path"].isin(["ok/photo.jpg", "bad/gps.jpg", "bad/cmyk.jpg"])
        m[keep].to_csv(manifest_path, index=False)
        assert runner.invoke(main, ["check", str(manifest_path), "--fail-on", "error"]).exit_code == 0
        result = runner.invoke(main, ["check", str(manifest_path), "--fail-on", "warning"])
        assert result.exit_code == 1 and "has-location (1)" in result.output

    def test_limits_recorded_in_sidecar(self, runner, manifest_path):
        """The limits used go into the sidecar next to the scan's options."""
        result = runner.invoke(main, ["check", str(manifest_path), "--min-side", "8", "--max-aspect", "5",
                                      "-q"])
        assert result.exit_code == 0 and result.output == ""
        options = read_sidecar(manifest_path)["stages"]["check"]["options"]
        assert options == {"min_side": 8, "max_pixels": defaults.MAX_PIXELS, "max_aspect": 5.0,
                           "min_spread": defaults.MIN_SPREAD, "fail_on": "never"}
        assert "scan" in read_sidecar(manifest_path)["stages"]
        assert read(manifest_path).set_index("path").loc["bad/tiny.jpg", "issues"] == ""

    @pytest.mark.parametrize("args", [["--min-side", "0"], ["--max-aspect", "0.5"], ["--fail-on", "often"]])
    def test_bad_options_exit_2(self, runner, manifest_path, args):
        """Out-of-range or unknown option values are usage errors (exit 2)."""
        assert runner.invoke(main, ["check", str(manifest_path), *args]).exit_code == 2

    def test_not_a_manifest_exit_2(self, runner, tmp_path):
        """A CSV that is not a manifest is refused with a one-line reason (exit 2)."""
        bad = tmp_path / "x.csv"
        bad.write_text("a,b\n1,2\n")
        result = runner.invoke(main, ["check", str(bad)])
        assert result.exit_code == 2 and "no 'path' column" in result.output

