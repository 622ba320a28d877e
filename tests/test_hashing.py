"""labelprep.hashing.fingerprint: pHash identical to imagehash, box and mirror hashes, detail."""

import imagehash
import numpy as np
import pytest
import skimage.data
from PIL import Image

from labelprep.clusters import LOW_DETAIL
from labelprep.hashing import fingerprint, sketch_pixels


def bits_apart(a: str, b: str) -> int:
    return bin(int(a, 16) ^ int(b, 16)).count("1")


@pytest.fixture(scope="module")
def astronaut():
    # scikit-image's bundled astronaut.png (public-domain NASA photograph), 512x512 RGB
    return Image.fromarray(skimage.data.astronaut())


@pytest.fixture(scope="module")
def camera():
    # scikit-image's bundled camera.png, 512x512 grayscale
    return Image.fromarray(skimage.data.camera())


class TestPhash:
    def test_golden_value_on_bundled_photo(self, astronaut):
        """Golden value: imagehash 4.3.2's phash of scikit-image's astronaut is c2924c5532bddfc8."""
        assert str(imagehash.phash(astronaut)) == "c2924c5532bddfc8"  # source: imagehash itself
        assert fingerprint(astronaut)["phash"] == "c2924c5532bddfc8"

    @pytest.mark.parametrize("mode", ["RGB", "L", "RGBA", "P", "CMYK", "1", "LA", "I", "F"])
    def test_equals_imagehash_in_every_mode(self, astronaut, mode):
        """Same bits as imagehash.phash (the reference implementation) whatever the Pillow mode."""
        img = astronaut.resize((300, 260)).convert(mode)
        assert fingerprint(img)["phash"] == str(imagehash.phash(img))

    @pytest.mark.parametrize("name", ["camera", "coffee", "chelsea", "moon", "text"])
    def test_equals_imagehash_on_bundled_photos(self, name):
        """Reference: imagehash.phash on scikit-image's bundled photographs."""
        img = Image.fromarray(getattr(skimage.data, name)())
        fp = fingerprint(img)
        assert fp["phash"] == str(imagehash.phash(img))
        assert all(len(fp[c]) == 16 and fp[c] == fp[c].lower()
                   for c in ("phash", "phash_c80", "phash_c70", "phash_mirror"))


class TestBoxesAndMirror:
    def test_mirror_hash_is_hash_of_mirrored_image(self, astronaut, camera):
        """Mirroring multiplies DCT-II coefficient k by (-1)**k; the result must match the
        hash of the flipped picture computed by imagehash."""
        for img in (astronaut, camera):
            flipped = img.transpose(Image.Transpose.FLIP_LEFT_RIGHT)
            assert bits_apart(fingerprint(img)["phash_mirror"], str(imagehash.phash(flipped))) <= 2

    @pytest.mark.parametrize("column, cut", [("phash_c80", 0.10), ("phash_c70", 0.15)])
    def test_box_hash_matches_cropped_copy(self, camera, column, cut):
        """A copy cropped by `cut` per side hashes (whole) close to the original's box hash,
        while its whole-image hash moves far (the reason the box hashes exist)."""
        w, h = camera.size
        crop = camera.crop((round(w * cut), round(h * cut), w - round(w * cut), h - round(h * cut)))
        original, copy = fingerprint(camera), fingerprint(crop)
        assert bits_apart(original[column], copy["phash"]) <= 4
        assert bits_apart(original["phash"], copy["phash"]) > 8


class TestDetail:
    def test_upsampled_digits_are_low_detail(self):
        """scikit-learn's 8x8 digits upsampled to 64x64 are smooth: all below LOW_DETAIL."""
        from sklearn.datasets import load_digits

        digits = load_digits().images[:200]
        detail = [fingerprint(Image.fromarray((d * 255 / 16).astype(np.uint8))
                              .resize((64, 64), Image.Resampling.BILINEAR))["detail"]
                  for d in digits]
        assert max(detail) < LOW_DETAIL

    @pytest.mark.parametrize("name", ["astronaut", "camera", "coffee", "chelsea", "rocket", "clock"])
    def test_photos_are_detailed(self, name):
        """scikit-image's bundled photographs are above LOW_DETAIL (clock, the smoothest, ~0.07)."""
        assert fingerprint(Image.fromarray(getattr(skimage.data, name)()))["detail"] > LOW_DETAIL

    def test_blank_image(self):
        """A flat image has no AC energy: detail 0, and still a valid hash."""
        fp = fingerprint(Image.new("RGB", (64, 64), (120, 130, 140)))
        assert fp["detail"] == 0.0
        assert fp["phash"] == str(imagehash.phash(Image.new("RGB", (64, 64), (120, 130, 140))))


class TestTransform:
    def test_dct_matrix_equals_scipy(self, camera):
        """The numpy DCT-II products give scipy.fftpack.dct's coefficients (the transform
        imagehash.phash calls; scipy as the reference implementation)."""
        from scipy.fftpack import dct

        from labelprep.hashing import _dct

        gray = camera.convert("L")
        thumb = np.asarray(gray.resize((32, 32), Image.Resampling.LANCZOS), dtype=np.float64)
        reference = dct(dct(thumb, axis=0), axis=1)
        np.testing.assert_allclose(_dct(gray, None), reference, rtol=1e-9, atol=1e-6)

    @pytest.mark.parametrize("name", ["camera", "astronaut", "coins"])
    def test_spread_is_the_thumbnail_standard_deviation(self, name):
        """Parseval's theorem for the orthonormal DCT: the AC energy is the thumbnail's variance
        times its 1024 pixels, so ``spread`` equals numpy's standard deviation of that thumbnail."""
        img = Image.fromarray(getattr(skimage.data, name)())
        thumb = img.convert("L").resize((32, 32), Image.Resampling.LANCZOS)
        expected = float(np.asarray(thumb, dtype=np.float64).std())
        assert fingerprint(img)["spread"] == pytest.approx(expected, abs=1e-4)

    @pytest.mark.parametrize("value", [0, 1, 128, 255])
    def test_flat_images_keep_imagehash_value(self, value):
        """A flat image's AC coefficients are exactly zero in scipy's transform; rounding noise of
        the matrix products must not turn them into hash bits (imagehash as the reference)."""
        img = Image.new("L", (40, 30), value)
        fp = fingerprint(img)
        assert fp["phash"] == str(imagehash.phash(img)) and fp["spread"] == 0.0


def test_rejects_non_image():
    with pytest.raises(TypeError, match="PIL.Image.Image, got ndarray"):
        fingerprint(np.zeros((8, 8)))


def test_sketch_is_the_thumbnail_the_phash_is_taken_from():
    """The sketch decodes to imagehash's own pHash thumbnail of scikit-image's astronaut photo
    (imagehash.phash: convert("L"), resize to 32x32 with Lanczos), so the pHash of the sketch's
    pixels is the file's phash, and an empty cell decodes to zeros."""
    img = Image.fromarray(skimage.data.astronaut())
    fp = fingerprint(img)
    pixels = sketch_pixels([fp["sketch"], ""])
    reference = np.asarray(img.convert("L").resize((32, 32), Image.Resampling.LANCZOS))
    assert np.array_equal(pixels[0], reference)
    assert str(imagehash.phash(Image.fromarray(pixels[0]))) == fp["phash"]
    assert not pixels[1].any()
    with pytest.raises(ValueError, match="1024 bytes"):
        sketch_pixels([fp["sketch"][:100]])


def test_shifted_phashes_equal_imagehash_of_the_moved_sketch():
    """Each shifted hash is imagehash.phash of the sketch moved by the step with its edge
    repeated (reference: imagehash.phash on the moved 32x32 image, which it does not resize),
    on scikit-image's camera and astronaut photos."""
    import imagehash
    import skimage.data

    from labelprep.hashing import SHIFTS, fingerprint, shifted_phashes, sketch_pixels

    for name in ("camera", "astronaut"):
        pixels = sketch_pixels([fingerprint(Image.fromarray(getattr(skimage.data, name)()))["sketch"]])
        for step in (2, 4):
            ours = shifted_phashes(pixels, step)[0]
            for (dy, dx), value in zip(SHIFTS, ours):
                padded = np.pad(pixels[0], step, mode="edge")
                moved = padded[step - dy * step: step - dy * step + 32, step - dx * step: step - dx * step + 32]
                assert f"{int(value):016x}" == str(imagehash.phash(Image.fromarray(moved))), (name, step, dy, dx)
