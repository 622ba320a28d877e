"""The learned-feature stage: the converted network, its cache, the embeddings and their cache."""

from __future__ import annotations

import pickle

import numpy as np
import pytest
from PIL import Image

pytest.importorskip("onnxruntime", reason="needs labelprep[features]")
pytest.importorskip("onnx", reason="needs labelprep[features]")

from labelprep import embedding  # noqa: E402
from labelprep.errors import InputError  # noqa: E402


@pytest.fixture(scope="module")
def network(tmp_path_factory):
    return embedding.Embedder(cache=tmp_path_factory.mktemp("cache"))


def _logits(net, array):
    img = Image.fromarray(array)
    return net.run(net.pixels(img)[None], output="logits")[0]


class TestConvertedNetwork:
    @pytest.mark.parametrize("photo, classes", [
        # ImageNet-1k class indices in the ILSVRC2012 order that Keras and torchvision use
        # (from memory): 281 tabby, 282 tiger cat, 285 Egyptian cat; 967 espresso, 968 cup;
        # 872 tripod (the cameraman stands behind one)
        ("chelsea", {281, 282, 285}),
        ("coffee", {967, 968}),
        ("camera", {872}),
    ])
    def test_top1_class_of_scikit_image_photos(self, network, photo, classes):
        """The converted EfficientNet-Lite0 names what scikit-image's bundled photos show."""
        import skimage.data

        array = getattr(skimage.data, photo)()
        logits = _logits(network, np.stack([array] * 3, axis=-1) if array.ndim == 2 else array)
        assert int(np.argmax(logits)) in classes

    def test_confident_on_those_photos(self, network):
        """Mean top-1 softmax probability over the three photos: 0.88 converted correctly; with
        the stride table shifted by one stage the classes above still come out, at 0.59 (both
        measured here), so this catches a network wired wrong that top-1 alone misses."""
        import skimage.data

        best = []
        for photo in ("chelsea", "coffee", "camera"):
            array = getattr(skimage.data, photo)()
            logits = _logits(network, np.stack([array] * 3, axis=-1) if array.ndim == 2 else array)
            p = np.exp(logits - logits.max())
            best.append(p.max() / p.sum())
        assert np.mean(best) >= 0.75

    def test_features_are_the_pooled_layer_before_the_classifier(self, network):
        """logits = features @ W.T + b with the state dict's own classifier weights."""
        import skimage.data

        state = embedding.read_state_dict(embedding.weights_path())
        batch = network.pixels(Image.fromarray(skimage.data.coffee()))[None]
        features = network.run(batch)
        logits = network.run(batch, output="logits")
        np.testing.assert_allclose(features @ state["_fc.weight"].T + state["_fc.bias"], logits,
                                   rtol=1e-4, atol=1e-3)

    def test_weights_match_the_pinned_digest(self):
        assert embedding.file_digest(embedding.weights_path()) == embedding.WEIGHTS_SHA256


class TestStateDictReader:
    def test_refuses_a_pickle_that_names_other_code(self, tmp_path):
        """The restricted unpickler resolves only what a state dict holds."""
        import os

        path = tmp_path / "evil.pth"
        with open(path, "wb") as f:
            for part in (0x1950A86A20F9469CFC6C, 1001, {}):
                pickle.dump(part, f)
            pickle.dump({"x": os.system}, f)
        with pytest.raises(pickle.UnpicklingError, match="no posix.system"):
            embedding.read_state_dict(path)

    def test_refuses_a_file_that_is_not_legacy_torch(self, tmp_path):
        path = tmp_path / "plain.pth"
        path.write_bytes(pickle.dumps(123))
        with pytest.raises(InputError, match="not a legacy PyTorch file"):
            embedding.read_state_dict(path)


class TestCache:
    def test_converts_once_per_cache_folder(self, tmp_path, monkeypatch):
        first = embedding.default_model(tmp_path)
        stamp = first.stat().st_mtime_ns
        monkeypatch.setattr(embedding, "build_graph", lambda state: pytest.fail("converted twice"))
        assert embedding.default_model(tmp_path) == first
        assert first.stat().st_mtime_ns == stamp

    def test_refuses_weights_with_another_digest(self, tmp_path, monkeypatch):
        monkeypatch.setattr(embedding, "WEIGHTS_SHA256", "0" * 64)
        with pytest.raises(InputError, match="not the pinned"):
            embedding.default_model(tmp_path)

    def test_cache_folder_from_the_environment(self, tmp_path, monkeypatch):
        monkeypatch.setenv("LABELPREP_CACHE", str(tmp_path))
        assert embedding.cache_dir() == tmp_path


def _mean_colour_model(path):
    """An ONNX model of our own: the embedding is the mean of each colour channel."""
    import onnx
    from onnx import TensorProto, helper

    graph = helper.make_graph(
        [helper.make_node("GlobalAveragePool", ["x"], ["pooled"])], "mean",
        [helper.make_tensor_value_info("x", TensorProto.FLOAT, [None, 3, 32, 32])],
        [helper.make_tensor_value_info("pooled", TensorProto.FLOAT, [None, 3, 1, 1])])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 13)])
    model.ir_version = 8
    onnx.save(model, str(path))
    return path


class TestEmbed:
    def test_user_model_sees_rgb_in_0_1_at_its_input_size(self, tmp_path, class_tree):
        """A user's model gets the frame resized to its declared side, RGB scaled to 0-1."""
        from labelprep import scan

        model = _mean_colour_model(tmp_path / "mean.onnx")
        m = scan(class_tree, jobs=1)
        vectors, facts = embedding.embed(m, class_tree, model=model, jobs=1)
        assert facts["model"] == "mean.onnx" and facts["sha256"] == embedding.file_digest(model)
        path = class_tree / m["path"].iloc[0]
        with Image.open(path) as im:
            im.draft("RGB", (32, 32))
            expected = np.asarray(im.convert("RGB").resize((32, 32), Image.Resampling.BILINEAR),
                                  float).mean(axis=(0, 1)) / 255
        np.testing.assert_allclose(vectors[0], expected, atol=2e-3)  # float16 storage

    def test_rescan_reuses_cached_embeddings(self, tmp_path, class_tree):
        from labelprep import scan

        model = _mean_colour_model(tmp_path / "mean.onnx")
        m = scan(class_tree, jobs=1)
        cache = tmp_path / "manifest.csv.features.npz"
        first, facts = embedding.embed(m, class_tree, model=model, jobs=1, cache=cache)
        assert facts["embedded"] == len(m) and facts["reused"] == 0
        again, facts = embedding.embed(m, class_tree, model=model, jobs=2, cache=cache)
        assert facts["embedded"] == 0 and facts["reused"] == len(m)
        np.testing.assert_array_equal(first, again)

    def test_a_cache_of_another_model_is_not_reused(self, tmp_path, class_tree):
        from labelprep import scan

        model = _mean_colour_model(tmp_path / "mean.onnx")
        m = scan(class_tree, jobs=1)
        cache = tmp_path / "c.features.npz"
        embedding._write_cache(cache, "f" * 64, {s: np.zeros(3, np.float16) for s in m["sha256"]})
        _, facts = embedding.embed(m, class_tree, model=model, jobs=1, cache=cache)
        assert facts["embedded"] == len(m)

    def test_missing_extra_is_one_line_naming_it(self, monkeypatch):
        import sys

        monkeypatch.setitem(sys.modules, "onnxruntime", None)
        with pytest.raises(InputError, match=r"pip install 'labelprep\[features\]'"):
            embedding.require()

    def test_sketch_needs_no_model(self):
        import pandas as pd

        vectors, facts = embedding.features_for(pd.DataFrame({"path": [], "sha256": []}), "x",
                                                features="sketch")
        assert vectors is None and facts == {"features": "sketch"}

    def test_bad_features_value_names_it(self):
        import pandas as pd

        from labelprep.errors import ParameterError

        with pytest.raises(ParameterError, match="features='cnn'"):
            embedding.features_for(pd.DataFrame({"path": []}), None, features="cnn")
