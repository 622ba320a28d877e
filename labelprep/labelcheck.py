"""The vet stage: files whose label their features contradict, and files far from every class.

Each labelled row is described by a unit vector: the model-free ``sketch`` (the scan's 32x32
grayscale thumbnail, described by its histograms of gradient orientation, which suit digits,
letters and icons) or the learned embedding (:mod:`labelprep.embedding`, which suits
photographs). With both, each is tried and the one whose neighbours agree more often with the
given labels is used (on the label-noise benchmark the sketch wins on digits and letters, the
embedding on photographs). Both are reduced by PCA fitted on a seeded sample (:data:`DIMENSIONS`), which keeps
the search cheap at a million rows and drops the directions that only carry noise.

Its ``neighbours`` most similar rows (:func:`labelprep.vectorsearch.top_k`) vote, out of fold:
the row itself and its byte-identical copies never vote, so a copy cannot vouch for its
original. (Near-duplicate clusters are not used for that: hash clusters chain, and on letters
across typefaces one cluster held 1,813 of 1,976 files, which would have silenced every vote.) A vote weighs its cosine similarity to the fourth power, so that the
closest neighbours dominate. ``label_doubt`` is the largest share of the votes held by another
label; at ``min_doubt`` or more the row gets that label in ``likely_label`` and the warning
``suspect-label``. ``oddness`` is the share of the row's (standardised) vector that the PCA
components leave unexplained, over the median of that share in the data set: a file unlike the
rest (a photo among digits scores 6.5-28, the digits at most 4.9) cannot be rebuilt from the
directions the data set varies along; at ``max_oddness`` or more the row is ``lone-image``.
``peer_same``/``peer_other`` name, for flagged rows, the nearest neighbour with the row's own
label and the nearest with another (the likely one when there is one): the report shows them
beside the file.
"""

from __future__ import annotations

from . import codes
from .defaults import MAX_ODDNESS, MIN_DOUBT, NEIGHBOURS
from .errors import ParameterError
from .vectorsearch import pca_units, top_k

# The defaults (labelprep.defaults) were measured by benchmarks/label_noise.py: MIN_DOUBT 0.8 on
# scikit-learn's digits with 4% planted wrong labels gives precision 0.97 at recall 0.99 from the
# sketch (on pixels instead of edge histograms, 0.5 gave 0.78 at 1.0 and 0.8 0.93 at 0.94);
# MAX_ODDNESS 6.0 sits between the 1,797 digits (at most 4.9 upsampled bilinearly, 4.3 nearest)
# and ten of scikit-image's photos planted among them (6.5-28).
DIMENSIONS = {"sketch": 64, "embedding": 64}
_POWER = 4
_SKETCH_BLOCK = 8192  # sketches described at once (a million at once would take many GB)
_CELL, _BINS = 2, 9
_RESIDUAL_DIMENSIONS = 32  # components of the sketch pixels that oddness is measured against
_STAGE = "vet"


def vet(manifest, *, embeddings=None, neighbours=NEIGHBOURS, min_doubt=MIN_DOUBT,
        max_oddness=MAX_ODDNESS, seed=0):
    """Flag likely mislabelled files and outliers.

    Parameters
    ----------
    manifest : pandas.DataFrame
        Needs ``path`` and ``label``; ``sketch`` unless ``embeddings`` are given; uses
        ``sha256`` (exact copies do not vote). Every labelled row with features is vetted.
    embeddings : ndarray, shape (len(manifest), d), optional
        One embedding per row (rows of NaN where none). With both these and ``sketch``, the
        kind whose neighbours agree more often with the labels (``attrs["vet"]["agreement"]``)
        is used; without them, the model-free sketch.
    neighbours : int, default 10
        Rows that vote on each row's label.
    min_doubt : float in (0, 1], default 0.8
        Share of the votes another label needs to be named in ``likely_label``.
    max_oddness : float > 1, default 6.0
        ``oddness`` from which a file is flagged ``lone-image``.
    seed : int
        Seeds the PCA sample and the cell search, so the result is reproducible.

    Returns
    -------
    pandas.DataFrame
        A copy with ``likely_label``, ``label_doubt``, ``oddness``, ``peer_same``,
        ``peer_other`` and the codes ``suspect-label`` and ``lone-image``; ``attrs["vet"]``
        records the options and the feature kind.

    Examples
    --------
    >>> import numpy as np, pandas as pd
    >>> m = pd.DataFrame({"path": [f"{i}.png" for i in range(6)], "label": list("aaabbb")})
    >>> x = np.array([[1, 0], [1, .1], [0, 1], [0, 1], [0, 1.1], [.1, 1]])
    >>> vet(m, embeddings=x, neighbours=2)["likely_label"].tolist()
    ['', '', 'b', '', '', '']
    """
    import numpy as np
    import pandas as pd

    if not isinstance(manifest, pd.DataFrame):
        raise TypeError(f"manifest must be a pandas DataFrame, got {type(manifest).__name__}")
    missing = [c for c in ("path", "label") if c not in manifest.columns]
    if embeddings is None and "sketch" not in manifest.columns:
        missing.append("sketch")
    if missing:
        raise ParameterError(f"manifest lacks column(s) {', '.join(missing)}")
    if isinstance(neighbours, bool) or not isinstance(neighbours, (int, np.integer)) or neighbours < 1:
        raise ParameterError(f"neighbours must be a positive int, got neighbours={neighbours!r}")
    if not 0 < min_doubt <= 1:
        raise ParameterError(f"min_doubt must be in (0, 1], got min_doubt={min_doubt!r}")
    if not max_oddness > 1:
        raise ParameterError(f"max_oddness must be above 1, got max_oddness={max_oddness!r}")
    features = None if embeddings is None else np.asarray(embeddings, dtype=np.float32)
    if features is not None and (features.ndim != 2 or len(features) != len(manifest)):
        raise ParameterError(f"embeddings must have one row per manifest row ({len(manifest)}), "
                             f"got shape {features.shape}")

    from .manifest import coerce

    rows = coerce(manifest)
    n = len(rows)
    labels = rows["label"].to_numpy(dtype=object)
    issues = rows["issues"] if "issues" in rows.columns else pd.Series([""] * n, dtype=object)
    # every labelled file with features is vetted, error or not: a label-conflict cluster is
    # exactly where a wrong label hides, and its members still tell their neighbours' labels
    usable = labels != ""
    kinds = []
    if features is not None:
        usable &= np.isfinite(features).all(axis=1)
        kinds.append("embedding")
    if "sketch" in rows.columns:
        usable &= rows["sketch"].to_numpy(dtype=object) != ""
        kinds.append("sketch")
    at = np.flatnonzero(usable)
    out = rows.copy()
    likely = np.full(n, "", dtype=object)
    doubt = np.full(n, np.nan)
    oddness = np.full(n, np.nan)
    peer_same = np.full(n, "", dtype=object)
    peer_other = np.full(n, "", dtype=object)
    kind, agreement = kinds[0], {}
    if len(at) > neighbours:
        names, code = np.unique(labels[at], return_inverse=True)
        blocked = None
        if "sha256" in rows.columns:
            blocked = pd.factorize(rows["sha256"].to_numpy(dtype=object)[at])[0]
        # with both kinds at hand, the one whose neighbours agree more with the labels decides:
        # a CNN's features suit photographs, the thumbnails suit digits and letters
        best_agreement = -1.0
        for candidate in kinds:
            vectors, residual_of = unit_vectors(rows, at, features if candidate == "embedding" else None, seed)
            found_index, found_sims = top_k(vectors, int(neighbours), blocked=blocked, seed=seed)
            found_share = _votes(found_index, found_sims, code, len(names))
            agreement[candidate] = round(float((np.argmax(found_share, axis=1) == code).mean()), 4)
            if agreement[candidate] > best_agreement:
                best_agreement, kind = agreement[candidate], candidate
                share, residual, chosen = found_share, residual_of, vectors
        own, vectors = code, chosen
        others = share.copy()
        others[np.arange(len(at)), own] = -1.0
        best = np.argmax(others, axis=1)
        doubt[at] = np.round(others[np.arange(len(at)), best], 4)
        suspect = doubt[at] >= min_doubt
        likely[at[suspect]] = names[best[suspect]]
        oddness[at] = np.round(residual / max(float(np.median(residual)), 1e-6), 4)
        flagged = suspect | (oddness[at] >= max_oddness)
        paths = rows["path"].to_numpy(dtype=object)[at]
        # a wrong label rarely has a neighbour of its own label among the voters: look for the
        # nearest one among all files of that label (only for the few flagged rows)
        same_at = _nearest_of_label(vectors, code, np.flatnonzero(flagged), own[flagged])
        other_label = np.where(others[np.arange(len(at)), best] > 0, best, -1)
        other_at = _nearest_of_label(vectors, code, np.flatnonzero(flagged), other_label[flagged])
        for target, found in ((peer_same, same_at), (peer_other, other_at)):
            rows_flagged = np.flatnonzero(flagged)
            hit = found >= 0
            target[at[rows_flagged[hit]]] = paths[found[hit]]
    out["likely_label"] = pd.Series(likely, index=rows.index, dtype=object)
    out["label_doubt"] = pd.array(doubt, dtype="Float64")
    out["oddness"] = pd.array(oddness, dtype="Float64")
    out["peer_same"] = pd.Series(peer_same, index=rows.index, dtype=object)
    out["peer_other"] = pd.Series(peer_other, index=rows.index, dtype=object)
    found = {"suspect-label": likely != "", "lone-image": np.nan_to_num(oddness) >= max_oddness}
    out["issues"] = codes.replace_stage_codes(issues.astype(str), _STAGE, found)
    out = coerce(out)
    out.attrs["vet"] = {"features": kind, "agreement": agreement, "neighbours": int(neighbours), "min_doubt": float(min_doubt),
                        "max_oddness": float(max_oddness), "seed": seed,
                        "vetted": int(len(at)), "suspect": int(found["suspect-label"].sum()),
                        "lone": int(found["lone-image"].sum())}
    return out


def unit_vectors(rows, at, features, seed):
    """Unit rows (float32) for the rows ``at`` (orientation histograms of the sketches, or the
    embeddings, PCA-reduced) and the share of each row the PCA leaves unexplained (for the
    sketch: of its standardised 16x16 pixels, which keep what a histogram of edges discards)."""
    import numpy as np

    from .hashing import sketch_pixels

    if features is not None:
        x = features[at].astype(np.float32)
        x /= np.maximum(np.linalg.norm(x, axis=1, keepdims=True), 1e-12)
        return pca_units(x, DIMENSIONS["embedding"], seed)
    cells = rows["sketch"].to_numpy(dtype=object)[at]
    edges = np.empty((len(at), (16 // _CELL) ** 2 * _BINS), dtype=np.float32)
    pixels = np.empty((len(at), 256), dtype=np.float32)
    for start in range(0, len(at), _SKETCH_BLOCK):
        raw = sketch_pixels(cells[start:start + _SKETCH_BLOCK])
        edges[start:start + len(raw)] = orientation_histograms(raw)
        pixels[start:start + len(raw)] = raw.reshape(len(raw), 16, 2, 16, 2).mean(axis=(2, 4)).reshape(len(raw), -1)
    pixels -= pixels.mean(axis=1, keepdims=True)
    pixels /= np.maximum(pixels.std(axis=1, keepdims=True), 1e-3)
    return pca_units(edges, DIMENSIONS["sketch"], seed)[0], pca_units(pixels, _RESIDUAL_DIMENSIONS, seed)[1]


def orientation_histograms(pixels):
    """Histograms of gradient orientation (Dalal & Triggs, CVPR 2005) of (n, 32, 32) thumbnails.

    On the 16x16 means of the thumbnail, per 2x2 cell, the gradient magnitudes are spread over 9 unsigned orientation bins (a
    soft histogram: each bin takes the magnitude times the cosine of the doubled angle between
    the gradient and the bin, where positive), and each cell's histogram is scaled to unit length, so the result ignores brightness and contrast and tolerates small shifts. On
    the label-noise benchmark they beat the raw pixels: letters across 38 typefaces agree with
    their neighbours' labels 89% of the time against 82%.

    Examples
    --------
    >>> import numpy as np
    >>> ramp = np.tile(np.arange(32, dtype=np.uint8) * 8, (1, 32, 1))   # brightness grows to the right
    >>> h = orientation_histograms(ramp).reshape(64, 9)
    >>> int(h[0].argmax())   # every gradient is horizontal: orientation bin 0
    0
    """
    import numpy as np

    x = np.asarray(pixels, dtype=np.float32)
    n = len(x)
    # on the 16x16 means of 2x2 pixels: a quarter of the work, and a digit or a letter keeps its
    # strokes' directions
    x = x.reshape(n, x.shape[1] // 2, 2, x.shape[2] // 2, 2).mean(axis=(2, 4))
    side = x.shape[1] // _CELL
    pool = np.kron(np.eye(side, dtype=np.float32), np.ones((1, _CELL), dtype=np.float32))
    gy, gx = np.gradient(x, axis=(1, 2))
    # a gradient's orientation, doubled so that opposite directions agree (unsigned), as the
    # unit vector (cos 2t, sin 2t) scaled by the magnitude: no arctan needed
    magnitude = np.sqrt(gx * gx + gy * gy) + 1e-6
    cos2, sin2 = (gx * gx - gy * gy) / magnitude, 2 * gx * gy / magnitude
    out = np.empty((n, side, side, _BINS), dtype=np.float32)
    for b, angle in enumerate(np.arange(_BINS) * (2 * np.pi / _BINS)):
        # the share of each gradient given to bin b falls off as the cosine of the angle between
        # them (doubled), zero beyond a quarter turn: a soft histogram
        weight = np.maximum(cos2 * np.float32(np.cos(angle)) + sin2 * np.float32(np.sin(angle)), 0)
        out[..., b] = pool @ weight @ pool.T  # the sum over each cell
    out /= np.linalg.norm(out, axis=3, keepdims=True) + 1e-3
    return out.reshape(n, -1)


def _votes(index, sims, code, classes):
    """Similarity-weighted vote shares (rows, classes) of each row's neighbours."""
    import numpy as np

    n, k = index.shape
    valid = index >= 0
    weight = np.where(valid, np.clip(np.nan_to_num(sims, neginf=0.0), 0, None) ** _POWER, 0.0)
    voter = np.where(valid, code[np.where(valid, index, 0)], -1)
    share = np.zeros((n, classes))
    rows = np.repeat(np.arange(n), k)
    ok = voter.ravel() >= 0
    np.add.at(share, (rows[ok], voter.ravel()[ok]), weight.ravel()[ok])
    total = share.sum(axis=1, keepdims=True)
    return share / np.where(total > 0, total, 1.0)


def _nearest_of_label(vectors, code, queries, wanted):
    """For each query row, the most similar other row whose label code is ``wanted``; -1 if none."""
    import numpy as np

    found = np.full(len(queries), -1, dtype=np.int64)
    for label in np.unique(wanted):
        mine = np.flatnonzero(wanted == label)
        candidates = np.flatnonzero(code == label)
        for start in range(0, len(mine), 256):
            block = mine[start:start + 256]
            sims = vectors[queries[block]] @ vectors[candidates].T
            sims[queries[block][:, None] == candidates[None, :]] = -np.inf
            best = np.argmax(sims, axis=1)
            ok = np.isfinite(sims[np.arange(len(block)), best])
            found[block[ok]] = candidates[best[ok]]
    return found
