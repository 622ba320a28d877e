"""The HTML report: one self-contained page (styles inline, thumbnails as data: URIs, no script).

The page is rendered from ``templates/report.html.j2`` with autoescaping on. Its Content-Security-
Policy forbids every network fetch, so it opens the same offline as online. To stay quick and small
on big manifests it caps how much it lists and says so where it does.
"""

from __future__ import annotations

import base64
import io
from pathlib import Path

from .. import codes
from . import cluster_table
from .text import UNASSIGNED, _balance_rows, _class_rows, _warning_lines, flatten, plural, source_rows

TEMPLATES = Path(__file__).parent / "templates"
THUMB_SIDE = 120          # CSS pixels of a tile; images are made at twice that for sharp phone screens
FILES_PER_ISSUE = 200     # files listed under each issue code
CLUSTERS_LISTED = 500     # clusters listed at all
CLUSTERS_WITH_THUMBS = 60  # of those, the first ones get thumbnails
MEMBERS_PER_STRIP = 16    # files drawn in one cluster's strip
SPLIT_COLOURS = {"train": "#2f6690", "val": "#c9822b", "test": "#3a7d44"}
OTHER_COLOUR = "#7a6f9b"


def render(m, summary: dict, *, root=None) -> str:
    """The HTML text of the report of completed manifest ``m`` with its ``summary``."""
    import jinja2

    env = jinja2.Environment(loader=jinja2.FileSystemLoader(TEMPLATES), autoescape=True,
                             trim_blocks=True, lstrip_blocks=True, undefined=jinja2.StrictUndefined)
    env.filters["plural"] = plural
    clusters, clusters_total = _clusters(m, root)
    class_header, class_rows = _class_rows(summary)
    balance_header, balance_rows = _balance_rows(summary)
    source_header, source_table = source_rows(summary) if "sources" in summary else ([], [])
    return env.get_template("report.html.j2").render(
        s=summary,
        colours=_colours(summary),
        chart=_chart(summary),
        class_header=class_header, class_rows=class_rows,
        balance_header=balance_header, balance_rows=balance_rows,
        source_header=source_header, source_rows=source_table,
        warnings=_warning_lines(summary),
        **_shortfall(summary),
        issues=_issue_files(m, summary),
        files_per_issue=FILES_PER_ISSUE,
        clusters=clusters, clusters_total=clusters_total,
        clusters_listed=CLUSTERS_LISTED, clusters_with_thumbs=CLUSTERS_WITH_THUMBS,
        members_per_strip=MEMBERS_PER_STRIP, thumb_side=THUMB_SIDE,
        has_root=root is not None,
        options=[(stage, flatten(value)) for stage, value in summary["options"].items()],
    )


def _shortfall(summary: dict) -> dict:
    """The split diagnosis for the page: headline lines, and each listed bundle with its line."""
    from .split_findings import bundle_lines, split_lines

    found = summary.get("split_diagnosis")
    lines = split_lines(found, bundles=False)
    bundles = [(bundle_lines(b)[0].strip(), b) for b in found["bundles"]] if lines else []
    return {"shortfall_lines": lines, "shortfall_bundles": bundles}


def _colours(summary: dict) -> dict:
    names = [n for n in summary["balance"]["splits"] if n != UNASSIGNED]
    return {n: SPLIT_COLOURS.get(n, OTHER_COLOUR) for n in names}


def _chart(summary: dict) -> list:
    """Per class, one bar per split: ``(class, [(split, count, width %)])``; widths share one scale."""
    splits = {n: s for n, s in summary["balance"]["splits"].items() if n != UNASSIGNED}
    largest = max([s["counts"][c] for s in splits.values() for c in summary["classes"]] + [1])
    return [(c, [(n, s["counts"][c], round(100 * s["counts"][c] / largest, 1)) for n, s in splits.items()])
            for c in summary["classes"]]


def _issue_files(m, summary: dict) -> list:
    """Per issue code found: its summary entry and the first files carrying it."""
    cells = m["issues"].tolist()
    found = []
    for entry in summary["issues"]:
        code = entry["code"]
        hits = [i for i, cell in enumerate(cells) if code in codes.parse(cell)][:FILES_PER_ISSUE]
        rows = m.iloc[hits]
        found.append({**entry, "files": list(zip(rows["path"], rows["label"], rows["split"]))})
    return found


def _clusters(m, root) -> tuple[list, int]:
    """The clusters to draw, most urgent first, with members, distances and thumbnails."""
    table = cluster_table(m)
    shown = table.head(CLUSTERS_LISTED)
    sub = m.loc[m["dup_group"].isin(shown.index)]
    # one sort for all clusters (keeper first, then path); per-cluster pandas calls are slow
    sub = sub.assign(_other=~sub["keeper"].fillna(False).astype(bool))
    sub = sub.sort_values(["dup_group", "_other", "path"], kind="stable")
    members_of: dict[int, list] = {}
    # a file the scan could not fully decode (its ``fault``), or one over the pixel budget, gets
    # no thumbnail: decoding it again would be slow or fail
    over_budget = sub["issues"].map(lambda cell: "pixel-limit" in codes.parse(cell)).astype(bool)
    risky = (sub["fault"] != "") | over_budget
    for gid, *fields in zip(sub["dup_group"].astype("int64"), sub["path"], sub["label"], sub["split"],
                            sub["phash"], risky):
        members_of.setdefault(int(gid), []).append(fields)
    out = []
    for rank, (gid, size, conflict, leak) in enumerate(zip(shown.index, shown["size"], shown["conflict"], shown["leak"])):
        members = members_of[int(gid)]
        keeper_hash = members[0][3]
        with_thumbs = root is not None and rank < CLUSTERS_WITH_THUMBS
        files = []
        for i, (path, label, split, phash, skip) in enumerate(members):
            draw = with_thumbs and i < MEMBERS_PER_STRIP
            previewable = draw and not skip
            files.append({"path": path, "label": label, "split": split or "left out", "keeper": i == 0,
                          "distance": hamming(keeper_hash, phash),
                          "thumb": thumbnail(root, path) if previewable else None, "drawn": draw})
        out.append({"id": int(gid), "size": int(size), "conflict": bool(conflict), "leak": bool(leak),
                    "files": files})
    return out, len(table)


def hamming(a: str, b: str):
    """Bits that differ between two 16-hex-digit perceptual hashes; None when either is missing.

    Examples
    --------
    >>> hamming("ffff000000000000", "0fff000000000001")
    5
    """
    if not a or not b:
        return None
    return (int(a, 16) ^ int(b, 16)).bit_count()


def thumbnail(root, path: str):
    """A ``data:image/jpeg;base64,...`` URI of ``root/path`` shrunk to the tile size, or None.

    Never raises: a file that is gone, unreadable or outside ``root`` gets no thumbnail.
    """
    from PIL import Image, ImageOps

    from ..probe import register_plugins
    from ..sources import read_bytes

    register_plugins()  # HEIF and JPEG XL previews, where their plugins are installed
    side = 2 * THUMB_SIDE
    try:
        with Image.open(io.BytesIO(read_bytes(root, path))) as im:  # a file, or an archive member
            im.draft("RGB", (side, side))  # JPEG: decode at reduced scale, much faster
            im = ImageOps.exif_transpose(im)
            im.thumbnail((side, side))
            im = _eight_bit(im)
            if im.mode in ("RGBA", "LA", "PA") or (im.mode == "P" and "transparency" in im.info):
                rgba = im.convert("RGBA")
                im = Image.new("RGB", rgba.size, "white")
                im.paste(rgba, mask=rgba.getchannel("A"))
            buffer = io.BytesIO()
            im.convert("RGB").save(buffer, "JPEG", quality=72)
    except Exception:  # noqa: BLE001 - any decoder failure only means "no preview"
        return None
    return "data:image/jpeg;base64," + base64.b64encode(buffer.getvalue()).decode("ascii")


def _eight_bit(im):
    """``im`` with 16-bit or wider samples brought into 0-255, so that converting to RGB does not
    clip them all to white."""
    import numpy as np
    from PIL import Image

    if im.mode.startswith("I;16"):
        return Image.fromarray((np.asarray(im, dtype=np.float64) / 257).round().astype(np.uint8))
    if im.mode in ("I", "F"):
        a = np.asarray(im, dtype=np.float64)
        span = a.max() - a.min()
        return Image.fromarray(((a - a.min()) * (255 / span if span else 0)).round().astype(np.uint8))
    return im
