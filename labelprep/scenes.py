"""Same-scene copies: heavier edits than hashes survive, proposed by embeddings, decided by geometry.

Learned features propose: each file's :data:`CANDIDATES` nearest neighbours by cosine similarity
of its embedding (PCA-reduced, :func:`labelprep.vectorsearch.top_k`) with a similarity of at
least :data:`MIN_SIMILARITY`. Similarity alone cannot decide (a 50% crop can score as low as two
different textures, two people's faces as high as a copy), so keypoints do: ORB keypoints of both
files (OpenCV, on a grayscale decode with the longer side at :data:`SIDE`), matched one to one
(mutual nearest Hamming neighbours that also pass Lowe's ratio test, Lowe, IJCV 2004), and a
RANSAC fit of one affine transform within :data:`TOLERANCE` pixels; the pair is a copy when at
least :data:`MIN_INLIERS` matches agree with it and they cover :data:`MIN_COVER` of both files'
keypoint area (their convex hulls), or when :data:`SURE_INLIERS` agree: drawn shapes repeated
across different pictures (the demo's starfish) match in one small region only. With ``flips`` the mirror image of
one file is matched too. Needs opencv-python-headless (the ``features`` extra).

:func:`scene_links` returns the verified links with their evidence; :func:`as_links` hands them
to :func:`labelprep.group` as extra verified links (its ``links=``: they join the star clusters
under the same no-chaining rule, ``link_kind`` ``given``), and :func:`mark` then writes the
``same-scene`` code and the ``scene_similarity``/``scene_inliers`` columns on the rows so joined.
"""

from __future__ import annotations

from typing import NamedTuple

from .errors import InputError

CANDIDATES = 5
MIN_SIMILARITY = 0.5
"""Lowest embedding similarity sent to the keypoint check: a bound on the work, not a decision
(benchmarks/hard_copies.py saw true pairs of the hard edits from 0.52 up)."""
MIN_INLIERS = 10
"""Measured by benchmarks/hard_copies.py: distinct tiles of one texture (brick, gravel, flowers)
keep at most 9 inliers under these matching rules, while 72% of the true candidate pairs reach
10 (a cross-check alone and a 10-pixel tolerance let textures reach 33)."""
MIN_COVER = 0.125
"""On the demo's generated pools, different pictures of one drawn shape agree on at most 19
inliers covering at most 12% of the keypoint area; 90% of the true hard-copy pairs cover more."""
SURE_INLIERS = 25
TOLERANCE = 3.0
RATIO = 0.8  # Lowe's ratio test (Lowe, IJCV 2004, uses 0.8)
SIDE = 512
_KEYPOINTS = 1000


class Links(NamedTuple):
    """Verified same-scene pairs: ``pairs`` (2, k) row positions, their ``similarity`` and ``inliers``."""

    pairs: object
    similarity: object
    inliers: object


def require():
    try:
        import cv2  # noqa: F401
    except ImportError as exc:
        from .embedding import EXTRA_LINE

        raise InputError(EXTRA_LINE) from exc


def scene_links(manifest, root, features, *, flips=False, jobs=None, cluster=None, seed=0, progress=None):
    """Same-scene pairs among the rows of ``manifest``, verified by keypoint geometry.

    Parameters
    ----------
    manifest : pandas.DataFrame
        Needs ``path``.
    root : path or dict
        What the paths are relative to.
    features : ndarray, shape (len(manifest), d)
        Embeddings (NaN rows are skipped), as :func:`labelprep.embedding.embed` returns.
    flips : bool
        Also match each candidate against the mirror image of the other.
    jobs, cluster, progress
        As in :func:`labelprep.scan`: the keypoints are computed on the scan's pool.
    seed : int

    Returns
    -------
    Links
        Positions are row positions of ``manifest`` (0..n-1), ``pairs[0] < pairs[1]``.
    """
    import numpy as np

    from .embedding import _plain_root
    from .parallel import map_ordered
    from .progress import resolve
    from .vectorsearch import pca_units, top_k

    require()
    features = np.asarray(features, dtype=np.float32)
    empty = Links(np.zeros((2, 0), dtype=np.int64), np.zeros(0), np.zeros(0, dtype=np.int64))
    at = np.flatnonzero(np.isfinite(features).all(axis=1)) if features.size else np.zeros(0, dtype=np.int64)
    if len(at) < 2:
        return empty
    x = features[at] / np.maximum(np.linalg.norm(features[at], axis=1, keepdims=True), 1e-12)
    vectors = x if len(at) <= 20_000 else pca_units(x, 64, seed)[0]
    index, sims = top_k(vectors, CANDIDATES, seed=seed)
    left = np.repeat(np.arange(len(at)), CANDIDATES)
    right = index.ravel()
    keep = (right >= 0) & (sims.ravel() >= MIN_SIMILARITY)
    pairs = np.sort(np.vstack([at[left[keep]], at[right[keep]]]), axis=0)
    if not pairs.size:
        return empty
    pairs = np.unique(pairs, axis=1)
    involved = np.unique(pairs)
    paths = manifest["path"].to_numpy(dtype=object)
    show = resolve(progress)
    found = map_ordered(_keypoints, [paths[i] for i in involved], jobs=jobs, chunksize=8,
                        cluster=cluster, shared=(_plain_root(root), bool(flips)))
    points = dict(zip(involved.tolist(), show(found, total=len(involved), label="keypoints")))
    checked = np.array([_inliers(points[a], points[b]) for a, b in pairs.T], dtype=float).reshape(-1, 2)
    inliers, cover = checked[:, 0].astype(np.int64), checked[:, 1]
    ok = (inliers >= SURE_INLIERS) | ((inliers >= MIN_INLIERS) & (cover >= MIN_COVER))
    # the similarity shown is the unreduced cosine, the one a user can recompute
    cosine = np.einsum("ij,ij->i", *(features[p] / np.linalg.norm(features[p], axis=1, keepdims=True)
                                     for p in pairs[:, ok]))
    return Links(pairs[:, ok], np.round(cosine, 4), inliers[ok])


def _keypoints(rel, shared):
    """ORB keypoints of one file: ``[(xy, descriptors)]``, and the mirror image's when asked."""
    import io

    import cv2
    import numpy as np
    from PIL import Image, ImageOps

    from .probe import register_plugins
    from .sources import read_bytes

    root, flips = shared
    register_plugins()
    try:
        with Image.open(io.BytesIO(read_bytes(root, rel))) as im:
            im.draft("L", (SIDE, SIDE))
            gray = ImageOps.exif_transpose(im).convert("L")
            gray.thumbnail((SIDE, SIDE))
            pixels = np.asarray(gray)
    except Exception:  # noqa: BLE001 - the scan reported the file; it simply has no keypoints
        return []
    orb = cv2.ORB_create(nfeatures=_KEYPOINTS, fastThreshold=7)
    views = [pixels, pixels[:, ::-1].copy()] if flips else [pixels]
    out = []
    for view in views:
        keys, descriptors = orb.detectAndCompute(view, None)
        xy = np.array([k.pt for k in keys], dtype=np.float32).reshape(-1, 2)
        out.append((xy, descriptors))
    return out


def _inliers(first, second):
    """``(inliers, cover)``: most matches of the two files' keypoints that agree with one affine
    transform, and the smaller share of either file's keypoint hull that those inliers span."""
    import cv2

    if not first or not second:
        return 0, 0.0
    matcher = cv2.BFMatcher(cv2.NORM_HAMMING)
    best = (0, 0.0)
    xy_a, desc_a = first[0]
    for xy_b, desc_b in second:
        if desc_a is None or desc_b is None or len(desc_a) < 3 or len(desc_b) < 3:
            continue
        forward = matcher.knnMatch(desc_a, desc_b, k=2)
        backward = {m[0].queryIdx: m[0].trainIdx for m in matcher.knnMatch(desc_b, desc_a, k=1) if m}
        # one to one: each match must be the other's nearest too, and clearly better than the
        # second nearest (repeated texture gives many near-equal candidates)
        good = [m[0] for m in forward if len(m) == 2 and m[0].distance < RATIO * m[1].distance
                and backward.get(m[0].trainIdx) == m[0].queryIdx]
        if len(good) < MIN_INLIERS:
            continue
        src = xy_a[[m.queryIdx for m in good]]
        dst = xy_b[[m.trainIdx for m in good]]
        _, mask = cv2.estimateAffine2D(src, dst, method=cv2.RANSAC, ransacReprojThreshold=TOLERANCE,
                                       maxIters=2000, confidence=0.995, refineIters=0)
        if mask is not None and int(mask.sum()) > best[0]:
            kept = mask.ravel().astype(bool)
            best = (int(kept.sum()), min(_hull_share(src[kept], xy_a), _hull_share(dst[kept], xy_b)))
    return best


def _hull_share(points, everything):
    import cv2

    whole = cv2.contourArea(cv2.convexHull(everything))
    return cv2.contourArea(cv2.convexHull(points)) / whole if whole > 0 and len(points) >= 3 else 0.0


def as_links(manifest, links):
    """``links`` as the extra verified links :func:`labelprep.group` takes (``links=``): one
    ``join`` row per pair, its embedding similarity as the likeness; None when there is none."""
    import pandas as pd

    if links is None or not len(links.inliers):
        return None
    paths = manifest["path"].to_numpy(dtype=object)
    return pd.DataFrame({"path": paths[links.pairs[0]], "other": paths[links.pairs[1]],
                         "action": "join", "likeness": links.similarity})


def mark(grouped, links):
    """``grouped`` (what :func:`labelprep.group` returned with :func:`as_links`) with the
    ``same-scene`` code and the ``scene_similarity``/``scene_inliers`` evidence on the rows whose
    link to their anchor is a same-scene link (``link_kind`` ``given``)."""
    import numpy as np
    import pandas as pd

    from . import codes

    out = grouped.drop(columns=["scene_similarity", "scene_inliers"], errors="ignore")
    n = len(out)
    similarity = np.full(n, np.nan)
    inliers = np.full(n, -1, dtype=np.int64)
    if links is not None and len(links.inliers):
        paths = out["path"].to_numpy(dtype=object)
        position = {p: i for i, p in enumerate(paths)}
        evidence = {}
        for a, b, sim, count in zip(paths[links.pairs[0]], paths[links.pairs[1]], links.similarity, links.inliers):
            evidence[(a, b)] = evidence[(b, a)] = (sim, count)
        given = out["link_kind"].to_numpy(dtype=object) == "given"
        anchors = out["linked_to"].to_numpy(dtype=object)
        for i in np.flatnonzero(given):
            found = evidence.get((paths[i], anchors[i]))
            if found is not None:
                similarity[i], inliers[i] = found
                similarity[position[anchors[i]]] = max(np.nan_to_num(similarity[position[anchors[i]]]), found[0])
    same = inliers >= 0
    cells = out["issues"].to_numpy(dtype=object).copy()
    for i in range(n):
        if same[i] or "same-scene" in cells[i]:
            kept = [c for c in codes.parse(cells[i]) if c != "same-scene"]
            cells[i] = codes.join(kept + (["same-scene"] if same[i] else []))
    out["issues"] = pd.Series(cells, index=out.index, dtype=object)
    out["scene_similarity"] = pd.array(np.where(same, similarity, np.nan), dtype="Float64")
    out["scene_inliers"] = pd.array(np.where(same, inliers, 0), dtype="Int64")
    out.loc[~same, "scene_inliers"] = pd.NA
    return out
