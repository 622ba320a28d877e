"""The HTML report: one self-contained page (styles inline, thumbnails as data: URIs, no script).

The page is rendered from ``templates/report.html.j2`` with autoescaping on. Its Content-Security-
Policy forbids every network fetch, so it opens the same offline as online. Every near-duplicate
cluster is listed; to stay small on big manifests the page has a budget of clusters and of
thumbnails, and says where it leaves anything out and that ``labelprep review`` shows it all.
"""

from __future__ import annotations

import base64
import io
from pathlib import Path

from .. import codes
from . import _weakest, cluster_table
from .text import UNASSIGNED, _balance_rows, _class_rows, _warning_lines, flatten, plural, source_rows

TEMPLATES = Path(__file__).parent / "templates"
THUMB_SIDE = 120          # CSS pixels of a tile; images are made at twice that for sharp phone screens
FILES_PER_ISSUE = 200     # files listed under each issue code
# budgets of the page's size: 20,000 clusters listed with every member as text are about 10 MB of
# HTML, 2,000 thumbnails of about 8 KB (base64 included) about 16 MB; past them, the page says how
# many it leaves out and points to the review page, which pages through everything
CLUSTERS_LISTED = 20_000
THUMBNAILS = 2_000        # thumbnails drawn, over all clusters, most urgent cluster first
SPLIT_COLOURS = {"train": "#2f6690", "val": "#c9822b", "test": "#3a7d44"}
OTHER_COLOUR = "#7a6f9b"


def render(m, summary: dict, *, root=None, review=None) -> str:
    """The HTML text of the report of completed manifest ``m`` with its ``summary``; ``review``
    is the output folder the page names in ``labelprep review DIR`` where it leaves things out."""
    import jinja2

    env = jinja2.Environment(loader=jinja2.FileSystemLoader(TEMPLATES), autoescape=True,
                             trim_blocks=True, lstrip_blocks=True, undefined=jinja2.StrictUndefined)
    env.filters["plural"] = plural
    clusters, clusters_total, unthumbed = _clusters(m, root)
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
        clusters=clusters, clusters_total=clusters_total, unthumbed=unthumbed,
        clusters_listed=CLUSTERS_LISTED, thumbnails=THUMBNAILS, thumb_side=THUMB_SIDE,
        review_command=f"labelprep review {review if review is not None else 'DIR'}",
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


def _clusters(m, root) -> tuple[list, int, int]:
    """The clusters to list, most urgent first, with members, distances and thumbnails; the
    number of clusters in all, and of listed files left without a thumbnail by the budget."""
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
    budget = THUMBNAILS if root is not None else 0
    unthumbed = 0
    for gid, size, conflict, leak in zip(shown.index, shown["size"], shown["conflict"], shown["leak"]):
        members = members_of[int(gid)]
        keeper_hash = members[0][3]
        files = []
        for i, (path, label, split, phash, skip) in enumerate(members):
            draw = budget > 0
            thumb = thumbnail(root, path) if draw and not skip else None
            budget -= thumb is not None  # a file that cannot be previewed costs no budget
            unthumbed += root is not None and not draw
            files.append({"path": path, "label": label, "split": split or "left out", "keeper": i == 0,
                          "distance": hamming(keeper_hash, phash), "thumb": thumb, "drawn": draw})
        out.append({"id": int(gid), "size": int(size), "conflict": bool(conflict), "leak": bool(leak),
                    "files": files, "weakest": _weakest(gid, shown.loc[gid])})
    return out, len(table), unthumbed


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
    data = preview_jpeg(root, path, 2 * THUMB_SIDE)
    return None if data is None else "data:image/jpeg;base64," + base64.b64encode(data).decode("ascii")


def preview_jpeg(root, path: str, side: int, quality: int = 72):
    """JPEG bytes of ``root/path`` oriented and shrunk to fit ``side`` pixels, or None.

    Never raises: a file that is gone, unreadable or outside ``root`` gets no preview.
    """
    from PIL import Image, ImageOps

    from ..probe import register_plugins
    from ..sources import read_bytes

    register_plugins()  # HEIF and JPEG XL previews, where their plugins are installed
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
            im.convert("RGB").save(buffer, "JPEG", quality=quality)
    except Exception:  # noqa: BLE001 - any decoder failure only means "no preview"
        return None
    return buffer.getvalue()


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
