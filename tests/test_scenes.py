"""Same-scene copies: proposed by embeddings, decided by keypoints, joined to the clusters."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from PIL import Image, ImageOps

pytest.importorskip("cv2", reason="needs labelprep[features]")
pytest.importorskip("onnxruntime", reason="needs labelprep[features]")

import labelprep  # noqa: E402
from labelprep import scenes  # noqa: E402


@pytest.fixture(scope="module")
def hard_tree(tmp_path_factory):
    """scikit-image photos, each with a 20-degree rotation and a 30% crop per side; plus
    two distinct tiles of the brick texture (no copy of each other)."""
    import skimage.data

    root = tmp_path_factory.mktemp("hard") / "photos"
    for name in ("astronaut", "coffee", "rocket"):
        img = Image.fromarray(getattr(skimage.data, name)()).convert("RGB")
        w, h = img.size
        folder = root / name
        folder.mkdir(parents=True)
        img.save(folder / "original.png")
        img.rotate(20, resample=Image.Resampling.BILINEAR, expand=True).save(folder / "rot20.jpg", quality=90)
        img.crop((int(w * .3), int(h * .3), int(w * .7), int(h * .7))).save(folder / "crop30.jpg", quality=90)
        ImageOps.mirror(img).save(folder / "mirror.jpg", quality=70)
    brick = Image.fromarray(skimage.data.brick()).convert("RGB")
    (root / "brick").mkdir()
    brick.crop((0, 0, 256, 256)).save(root / "brick" / "left.png")
    brick.crop((256, 256, 512, 512)).save(root / "brick" / "right.png")
    return root


@pytest.fixture(scope="module")
def scanned(hard_tree, tmp_path_factory):
    from labelprep.embedding import features_for

    m = labelprep.check(labelprep.scan(hard_tree, jobs=1))
    vectors, _ = features_for(m, hard_tree, features="model", jobs=1,
                              cache=tmp_path_factory.mktemp("c") / "m.csv.features.npz")
    return m, vectors


def _grouped(m, links, **options):
    """group with the same-scene links as its extra verified links, then their evidence."""
    return scenes.mark(labelprep.group(m, links=scenes.as_links(m, links), **options), links)


class TestSceneLinks:
    def test_hard_edits_join_their_original_and_distinct_tiles_stay_apart(self, hard_tree, scanned):
        m, vectors = scanned
        links = scenes.scene_links(m, hard_tree, vectors, jobs=1)
        out = _grouped(m, links, flips=False)
        dup = dict(zip(out["path"], out["dup_group"]))
        for name in ("astronaut", "coffee", "rocket"):
            assert dup[f"{name}/rot20.jpg"] == dup[f"{name}/original.png"] == dup[f"{name}/crop30.jpg"]
            assert pd.isna(dup[f"{name}/mirror.jpg"]) or dup[f"{name}/mirror.jpg"] != dup[f"{name}/original.png"]
        assert pd.isna(dup["brick/left.png"]) or dup["brick/left.png"] != dup["brick/right.png"]
        assert len({dup[f"{n}/original.png"] for n in ("astronaut", "coffee", "rocket")}) == 3

    def test_evidence_and_code_on_rows_hashes_missed(self, hard_tree, scanned):
        m, vectors = scanned
        out = _grouped(m, scenes.scene_links(m, hard_tree, vectors, jobs=1))
        row = out.set_index("path").loc["rocket/rot20.jpg"]
        assert "same-scene" in row["issues"]
        assert row["scene_inliers"] >= scenes.MIN_INLIERS
        assert 0 < row["scene_similarity"] <= 1
        plain = labelprep.group(m, flips=False)
        assert "scene_inliers" not in plain.columns
        assert pd.isna(plain.set_index("path").loc["rocket/rot20.jpg", "dup_group"])  # hashes miss it

    def test_flips_match_the_mirror_image(self, hard_tree, scanned):
        m, vectors = scanned
        out = _grouped(m, scenes.scene_links(m, hard_tree, vectors, flips=True, jobs=1), flips=True)
        dup = dict(zip(out["path"], out["dup_group"]))
        assert dup["astronaut/mirror.jpg"] == dup["astronaut/original.png"]

    def test_no_features_no_links(self, hard_tree, scanned):
        m, _ = scanned
        links = scenes.scene_links(m, hard_tree, np.full((len(m), 4), np.nan), jobs=1)
        assert links.pairs.shape == (2, 0)


class TestPrepareWithFeatures:
    def test_prepare_records_model_and_digest(self, hard_tree, tmp_path, monkeypatch):
        from labelprep.embedding import WEIGHTS_SHA256
        from labelprep.manifest import read_sidecar

        m, _ = labelprep.prepare(hard_tree, tmp_path / "out", jobs=1, seed=0)
        meta = read_sidecar(tmp_path / "out" / "manifest.csv")
        features = meta["stages"]["prepare"]["features"]
        assert features["model"] == "efficientnet-lite0" and features["sha256"] == WEIGHTS_SHA256
        assert (tmp_path / "out" / "manifest.csv.features.npz").is_file()
        assert m["issues"].str.contains("same-scene").any()
        again, _ = labelprep.prepare(hard_tree, tmp_path / "out", jobs=1, seed=0)
        meta = read_sidecar(tmp_path / "out" / "manifest.csv")
        assert meta["stages"]["prepare"]["features"]["embedded"] == 0  # the rescan reused them
        pd.testing.assert_frame_equal(m, again)
