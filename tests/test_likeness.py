"""labelprep.likeness: pixel evidence for near-duplicate candidates, pinned against scikit-image
and scipy on real photographs (scikit-image's bundled images) and their edits."""

import io

import numpy as np
import pytest
import skimage.data
from PIL import Image, ImageEnhance
from scipy.stats import pearsonr
from skimage.metrics import structural_similarity
from skimage.registration import phase_cross_correlation

from labelprep import likeness
from labelprep.hashing import fingerprint, sketch_pixels

PHOTOS = ("astronaut", "camera", "coffee", "chelsea", "rocket")


def sketch(img):
    return sketch_pixels([fingerprint(img)["sketch"]])[0]


def jpeg(img, quality):
    buf = io.BytesIO()
    img.convert("RGB").save(buf, "JPEG", quality=quality)
    return Image.open(io.BytesIO(buf.getvalue()))


EDITS = {
    "jpeg60": lambda im: jpeg(im, 60),
    "brighter": lambda im: ImageEnhance.Brightness(im).enhance(1.2),
    "resized60": lambda im: im.resize((im.size[0] * 6 // 10, im.size[1] * 6 // 10), Image.Resampling.BICUBIC),
    "mirrored": lambda im: im.transpose(Image.Transpose.FLIP_LEFT_RIGHT),
}


@pytest.fixture(scope="module")
def photos():
    return {name: Image.fromarray(getattr(skimage.data, name)()) for name in PHOTOS}


class TestAgainstScikitImage:
    def test_shift_equals_phase_cross_correlation(self, photos):
        """Two overlapping windows of each photo, 16 px down and 8 px right of each other
        (2 and 1 sketch pixels): the shift compare() finds is the one scikit-image's
        phase_cross_correlation (reference, moving) registers the second sketch with."""
        for name, img in photos.items():
            big = img.convert("RGB").resize((320, 320))
            a, b = sketch(big.crop((0, 0, 256, 256))), sketch(big.crop((8, 16, 264, 272)))
            ours = likeness.compare(a[None], b[None])
            # reference: skimage.registration.phase_cross_correlation
            reference = phase_cross_correlation(a.astype(float), b.astype(float))[0]
            assert ours["shift"][0].tolist() == reference.astype(int).tolist(), name
            assert likeness.accepted(ours)[0], name

    def test_edited_copies_accepted_where_ssim_is_high_and_others_refused(self, photos):
        """Every edit of a photo is accepted and has an SSIM of at least 0.95 to it (mirrored
        copies after mirroring back); every pair of different photos is refused and has an
        SSIM under 0.3 (reference: skimage.metrics.structural_similarity, data_range 255)."""
        blemish_copies, blemish_others = [], []
        for name, img in photos.items():
            a = sketch(img)
            for edit, make in EDITS.items():
                b = sketch(make(img))
                ours = likeness.compare(a[None], b[None])
                assert likeness.accepted(ours)[0], (name, edit)
                assert ours["mirrored"][0] == (edit == "mirrored")
                seen = b[:, ::-1] if edit == "mirrored" else b
                assert structural_similarity(a, seen, data_range=255) >= 0.95, (name, edit)
                blemish_copies.append(ours["blemish"][0])
        for i, first in enumerate(PHOTOS):
            for second in PHOTOS[i + 1:]:
                a, b = sketch(photos[first]), sketch(photos[second])
                ours = likeness.compare(a[None], b[None])
                assert not likeness.accepted(ours)[0], (first, second)
                assert structural_similarity(a, b, data_range=255) < 0.3
                blemish_others.append(ours["blemish"][0])
        assert max(blemish_copies) < likeness.MAX_BLEMISH < min(blemish_others)

    def test_likeness_is_pearson_correlation_when_aligned(self, photos):
        """With no shift, crop or mirror chosen, likeness is the Pearson correlation of the two
        sketches (reference: scipy.stats.pearsonr), up to the few hundredths of a pixel the
        parabola through the correlation peak may still move the second by."""
        a = sketch(photos["camera"])
        b = sketch(EDITS["brighter"](photos["camera"]))
        ours = likeness.compare(a[None], b[None], mirror=False)
        assert ours["shift"][0].tolist() == [0, 0] and ours["zoom"][0].tolist() == [1.0, 1.0]
        assert ours["likeness"][0] == pytest.approx(pearsonr(a.ravel(), b.ravel())[0], abs=1e-4)


class TestEvidence:
    def test_a_moved_stroke_is_a_blemish_noise_is_not(self):
        """A bar moved by 3 px gives a large local residual; JPEG-like noise spread over the
        image a small one, though both keep a high correlation (invented images)."""
        base = np.full((32, 32), 255, np.uint8)
        base[6:26, 8:12] = 0
        base[6:10, 8:24] = 0
        moved = base.copy()
        moved[14:26, 8:12] = 255
        moved[14:26, 11:15] = 0
        rng = np.random.default_rng(0)
        noisy = np.clip(base + rng.normal(0, 6, base.shape), 0, 255).astype(np.uint8)
        out = likeness.compare(np.stack([base, base]), np.stack([moved, noisy]), mirror=False)
        assert out["blemish"][0] > likeness.MAX_BLEMISH > out["blemish"][1]
        assert likeness.accepted(out).tolist() == [False, True]

    def test_flat_sketches_match_only_at_the_same_level(self):
        flat = np.full((3, 32, 32), 120, np.uint8)
        other = flat.copy()
        other[1] = 121
        other[2] = 180
        assert likeness.accepted(likeness.compare(flat, other)).tolist() == [True, True, False]

    def test_shapes_are_checked(self):
        with pytest.raises(ValueError, match="32, 32"):
            likeness.compare(np.zeros((2, 16, 16), np.uint8), np.zeros((2, 16, 16), np.uint8))
