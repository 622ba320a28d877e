"""Tests of labelprep.reports: the summary, its JSON/Markdown/terminal views and the HTML page."""

from __future__ import annotations

import base64
import hashlib
import io
import json
import re
from html.parser import HTMLParser
from pathlib import Path

import imagehash
import numpy as np
import pandas as pd
import pytest
from PIL import Image

from labelprep import reports
from labelprep.errors import ParameterError
from labelprep.reports import page

SUMMARY_KEYS = ["format", "version", "files", "in_split", "left_out", "splits", "classes", "balance",
                "issues", "near_duplicates", "split_diagnosis", "seed", "root", "options"]


def make_report_dataset(root: Path) -> pd.DataFrame:
    """Images from scikit-image's bundled data (chelsea the cat, coffee, astronaut) with planted
    near-duplicates: a resized copy in the same split, a cross-split pair and a label conflict;
    plus distinct random images and one too-small file. Returns the manifest."""
    from skimage import data

    rows = []

    def add(rel, im, label, split, issues="", dup=None, keeper=True):
        path = root / rel
        path.parent.mkdir(parents=True, exist_ok=True)
        im.save(path)
        rows.append({"path": rel, "label": label, "split": split, "issues": issues, "dup_group": dup,
                     "keeper": keeper, "phash": str(imagehash.phash(im)),
                     "sha256": hashlib.sha256(path.read_bytes()).hexdigest()})

    cat = Image.fromarray(data.chelsea()).resize((120, 80))
    mug = Image.fromarray(data.coffee()).resize((120, 80))
    person = Image.fromarray(data.astronaut()).resize((96, 96))
    rng = np.random.default_rng(0)
    for i, split in enumerate(["train"] * 8 + ["val"] * 2 + ["test"] * 2):
        noise = Image.fromarray(rng.integers(0, 255, (40, 40, 3), dtype=np.uint8))
        add(f"cat/n{i:02d}.png", noise, "cat", split)
    for i, split in enumerate(["train"] * 4 + ["val", "test"]):
        noise = Image.fromarray(rng.integers(0, 255, (40, 40, 3), dtype=np.uint8))
        add(f"mug/n{i:02d}.png", noise, "mug", split)
    add("cat/chelsea.png", cat, "cat", "train", "near-copy", 1, True)
    add("cat/chelsea_small.jpg", cat.resize((60, 40)), "cat", "train", "near-copy", 1, False)
    add("mug/coffee.png", mug, "mug", "", "label-conflict;near-copy", 2, True)
    add("cat/coffee_copy.jpg", mug.resize((90, 60)), "cat", "", "label-conflict;near-copy", 2, False)
    add("person/astronaut.png", person, "person", "train", "near-copy", 3, True)
    add("person/astronaut_b.jpg", person.rotate(2), "person", "test", "near-copy", 3, False)
    add("person/p1.png", person.transpose(Image.Transpose.FLIP_TOP_BOTTOM), "person", "val")
    add("mug/tiny.png", mug.resize((8, 6)), "mug", "", "too-small")
    m = pd.DataFrame(rows)
    m["dup_group"] = m["dup_group"].astype("Int64")
    m["keeper"] = m["keeper"].astype("boolean")
    return m


META = {"seed": 7, "root": "/data/photos", "written": "2026-01-01T00:00:00+00:00",
        "stages": {"split": {"ratios": [0.8, 0.1, 0.1], "seed": 7}, "check": {"min_side": 32}}}


@pytest.fixture(scope="module")
def dataset(tmp_path_factory):
    root = tmp_path_factory.mktemp("report") / "root"
    return root, make_report_dataset(root)


class _Page(HTMLParser):
    """Collects what the tests read from the HTML: data-count values, clusters, images, links."""

    def __init__(self):
        super().__init__()
        self.counts, self.clusters, self.images, self.urls = {}, {}, [], []
        self.members = {}  # cluster id -> paths of its members, in page order
        self._count = self._cluster = None

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if "data-count" in a:
            self._count = a["data-count"]
        if "data-cluster" in a:
            self._cluster = int(a["data-cluster"])
            self.clusters[self._cluster] = a.get("class", "")
        if "data-member" in a:
            self.members.setdefault(self._cluster, []).append(a["data-member"])
        if tag == "img":
            self.images.append(a["src"])
        self.urls += [v for k, v in attrs if k in ("src", "href") and v]

    def handle_data(self, data):
        if self._count is not None:
            self.counts[self._count] = int(data)
            self._count = None


def parse_page(text: str) -> _Page:
    parsed = _Page()
    parsed.feed(text)
    return parsed


class TestSummary:
    def test_weakest_link_of_each_cluster(self):
        """Two clusters of scikit-image's camera and coffee photos with a JPEG and a brightened
        copy each: every cluster's weakest link is its member with the largest blemish, named
        with the anchor it was verified against, in the summary and on the terminal."""
        import io

        import skimage.data
        from PIL import Image, ImageEnhance

        from labelprep.clusters import group
        from labelprep.hashing import fingerprint

        rows = []
        for name in ("camera", "coffee"):
            img = Image.fromarray(getattr(skimage.data, name)())
            buf = io.BytesIO()
            img.convert("RGB").save(buf, "JPEG", quality=60)
            for kind, im in (("orig", img), ("jpeg", Image.open(buf)), ("bright", ImageEnhance.Brightness(img).enhance(1.25))):
                rows.append({"path": f"{name}-{kind}.png", "label": name, "sha256": f"{name}{kind}", **fingerprint(im)})
        m = group(pd.DataFrame(rows))
        weakest = reports.report(m)["near_duplicates"]["weakest_links"]
        assert len(weakest) == 2
        for w in weakest:
            members = m[m["dup_group"] == w["cluster"]]
            worst = members.loc[members["link_blemish"].astype(float).idxmax()]
            assert (w["path"], w["linked_to"]) == (worst["path"], worst["linked_to"])
            assert w["blemish"] == pytest.approx(float(worst["link_blemish"]), abs=1e-4)
        assert f"Weakest link: {weakest[0]['path']} to {weakest[0]['linked_to']}" in reports.terminal_table(reports.report(m))

    def test_keys_and_counts(self, dataset):
        """Stable keys; totals and issue counts equal a direct count of the manifest."""
        _, m = dataset
        s = reports.report(m, meta=META)
        assert list(s) == SUMMARY_KEYS
        assert s["format"] == "labelprep-report/1"
        assert (s["files"], s["in_split"], s["left_out"]) == (len(m), (m["split"] != "").sum(), (m["split"] == "").sum())
        assert {k: v["count"] for k, v in s["splits"].items()} == m.loc[m["split"] != "", "split"].value_counts().to_dict()
        by_code = {i["code"]: i["rows"] for i in s["issues"]}
        assert by_code == {"too-small": 1, "near-copy": 6, "label-conflict": 2}
        assert [i["severity"] for i in s["issues"]] == ["error", "warning", "error"]
        # this manifest's clusters were written by hand, with no link evidence to show
        assert s["near_duplicates"].pop("weakest_links") == []
        assert s["near_duplicates"] == {"clusters": 3, "files": 6, "label_conflicts": 1, "across_splits": 1}
        assert s["seed"] == 7 and s["options"] == META["stages"]
        assert s["balance"]["splits"]["train"]["counts"] == {"cat": 10, "mug": 4, "person": 1}

    def test_json_file_is_the_summary(self, dataset, tmp_path):
        """report.json parses back to exactly the returned dict and names the tool in its first bytes."""
        _, m = dataset
        s = reports.report(m, json=tmp_path / "r.json", meta=META)
        text = (tmp_path / "r.json").read_text(encoding="utf-8")
        assert json.loads(text) == s
        assert b"labelprep" in text.encode()[:64]

    def test_scan_only_manifest(self):
        """A manifest without issues, dup_group or split columns still reports (all left out)."""
        m = pd.DataFrame({"path": ["a.png", "b.png"], "label": ["x", "y"]})
        s = reports.report(m)
        assert (s["in_split"], s["left_out"], s["issues"], s["near_duplicates"]["clusters"]) == (0, 2, [], 0)
        assert s["seed"] is None and s["options"] == {}

    def test_seed_from_a_stage(self):
        """Without a top-level seed, the first stage that records one is used."""
        m = pd.DataFrame({"path": ["a.png"], "label": ["x"], "split": ["train"]})
        assert reports.report(m, meta={"stages": {"check": {}, "split": {"seed": 3}}})["seed"] == 3

    @pytest.mark.parametrize("kwargs, error, match", [
        ({"json": 5}, TypeError, "json must be a path"),
        ({"meta": ["seed"]}, TypeError, "meta must be a dict"),
        ({"root": "/no/such/folder"}, ParameterError, "root='/no/such/folder' is neither a folder nor an archive"),
    ])
    def test_bad_parameters(self, dataset, kwargs, error, match):
        """Wrong types and missing folders are refused with the value named."""
        _, m = dataset
        with pytest.raises(error, match=match):
            reports.report(m, **kwargs)


class TestTextViews:
    def test_terminal_table(self, dataset):
        """The table's class rows carry the per-split counts; warnings name the thin classes."""
        _, m = dataset
        text = reports.terminal_table(reports.report(m))
        lines = text.splitlines()
        assert lines[0] == f"{len(m)} files: 23 in a split, 3 left out; 3 classes"
        assert re.search(r"^cat\s+10\s+2\s+2\s+14\s+1$", text, re.M)
        assert re.search(r"^all\s+15\s+4\s+4\s+23\s+3$", text, re.M)
        assert "warning: val: class 'person' has 1 file (fewer than 10)" in lines

    def test_markdown_tables(self, dataset, tmp_path):
        """Every Markdown table row has as many cells as its header (GitHub-flavoured table syntax)."""
        _, m = dataset
        reports.report(m, markdown=tmp_path / "r.md", meta=META)
        text = (tmp_path / "r.md").read_text()
        assert text.startswith("# labelprep report\n")
        tables = re.findall(r"((?:^\|.*\|\n)+)", text, re.M)
        assert len(tables) == 3
        for table in tables:
            widths = {len(re.split(r"(?<!\\)\|", row)) for row in table.splitlines()}
            assert len(widths) == 1
        assert "- split.ratios: [0.8, 0.1, 0.1]" in text


@pytest.fixture(scope="module")
def html(dataset, tmp_path_factory):
    """The page of the dataset, with thumbnails, and its summary."""
    root, m = dataset
    out = tmp_path_factory.mktemp("html") / "r.html"
    summary = reports.report(m, html=out, root=root, meta=META)
    return out.read_text(encoding="utf-8"), summary


class TestHtml:
    def test_numbers_shown(self, html):
        """The headline tiles and issue counts in the page equal the summary."""
        text, s = html
        counts = parse_page(text).counts
        assert counts["files"] == s["files"] and counts["in-split"] == s["in_split"]
        assert counts["left-out"] == s["left_out"]
        assert {k: counts[f"split-{k}"] for k in s["splits"]} == {k: v["count"] for k, v in s["splits"].items()}
        assert counts["conflicts"] == 1 and counts["across-splits"] == 1 and counts["clusters"] == 3
        assert {i["code"]: counts[f"issue-{i['code']}"] for i in s["issues"]} == {i["code"]: i["rows"] for i in s["issues"]}

    def test_every_cluster_with_thumbnails(self, html):
        """Each cluster is drawn, the conflict marked, every member as a decodable JPEG thumbnail."""
        text, _ = html
        parsed = parse_page(text)
        assert sorted(parsed.clusters) == [1, 2, 3]
        assert "conflict" in parsed.clusters[2] and "leak" in parsed.clusters[3]
        assert len(parsed.images) == 6
        for uri in parsed.images:
            assert uri.startswith("data:image/jpeg;base64,")
            with Image.open(io.BytesIO(base64.b64decode(uri.split(",", 1)[1]))) as im:
                assert im.format == "JPEG" and max(im.size) <= 2 * page.THUMB_SIDE

    def test_self_contained(self, html):
        """No URL other than data: URIs, and a policy that blocks every fetch."""
        text, _ = html
        assert all(u.startswith("data:") for u in parse_page(text).urls)
        without_images = re.sub(r'src="data:[^"]*"', "", text)
        assert not re.search(r"(?:https?:)?//[a-z0-9]", without_images, re.I)
        assert "default-src 'none'" in text

    def test_distances_match_imagehash(self, dataset, html):
        """The bits shown for each non-keeper equal imagehash's Hamming distance to the keeper."""
        _, m = dataset
        text, _ = html
        for gid, members in m[m["dup_group"].notna()].groupby("dup_group"):
            keeper = members[members["keeper"]].iloc[0]
            for row in members[~members["keeper"]].itertuples():
                bits = imagehash.hex_to_hash(keeper.phash) - imagehash.hex_to_hash(row.phash)
                assert re.search(re.escape(row.path) + r"<br>.*?· " + f"{bits} bits off", text, re.S)

    def test_options_and_seed(self, html):
        """The seed and each stage option are on the page."""
        text, _ = html
        assert re.search(r"<dd data-seed>7</dd>", text)
        assert "<dt>ratios</dt><dd>[0.8, 0.1, 0.1]</dd>" in text and "<dt>min_side</dt><dd>32</dd>" in text

    def test_deterministic(self, dataset, tmp_path):
        """The same manifest gives byte-identical files."""
        root, m = dataset
        for name in ("a", "b"):
            reports.report(m, html=tmp_path / f"{name}.html", json=tmp_path / f"{name}.json", root=root, meta=META)
        assert (tmp_path / "a.html").read_bytes() == (tmp_path / "b.html").read_bytes()
        assert (tmp_path / "a.json").read_bytes() == (tmp_path / "b.json").read_bytes()

    def test_escaped(self, tmp_path):
        """Paths and labels are HTML-escaped, so a hostile file name cannot inject markup."""
        m = pd.DataFrame({"path": ["<script>x</script>.png", "b.png"], "label": ["<b>", "<b>"],
                          "split": ["train", "train"], "issues": ["near-copy", "near-copy"],
                          "dup_group": pd.array([1, 1], dtype="Int64")})
        reports.report(m, html=tmp_path / "r.html")
        text = (tmp_path / "r.html").read_text()
        assert "<script>" not in text and "&lt;script&gt;x&lt;/script&gt;.png" in text

    def test_budgets_are_stated(self, dataset, tmp_path, monkeypatch):
        """Over its budgets the page lists fewer clusters and thumbnails, says how many it leaves
        out, and names the review command that shows them."""
        root, m = dataset
        monkeypatch.setattr(page, "CLUSTERS_LISTED", 2)
        monkeypatch.setattr(page, "THUMBNAILS", 3)
        reports.report(m, html=tmp_path / "r.html", root=root, review="out")
        text = (tmp_path / "r.html").read_text()
        parsed = parse_page(text)
        assert sorted(parsed.clusters) == [2, 3]  # the conflict, then the cross-split cluster
        assert len(parsed.images) == 3
        listed = sum(len(files) for files in parsed.members.values())
        assert parsed.counts["clusters-left-out"] == 1
        assert parsed.counts["files-without-thumbnail"] == listed - 3
        assert "<code>labelprep review out</code> shows every cluster" in text

    def test_every_cluster_within_budget(self, dataset, tmp_path):
        """Within the budgets every cluster and every member is on the page, with no budget note."""
        root, m = dataset
        reports.report(m, html=tmp_path / "r.html", root=root)
        text = (tmp_path / "r.html").read_text()
        parsed = parse_page(text)
        members = m[m["dup_group"].notna()].groupby("dup_group")["path"].apply(sorted)
        assert {k: sorted(v) for k, v in parsed.members.items()} == members.to_dict()
        assert 'id="cluster-budget"' not in text

    def test_without_root_no_thumbnails(self, dataset, tmp_path):
        """Without the scanned folder the clusters are listed as text and the page says why."""
        _, m = dataset
        reports.report(m, html=tmp_path / "r.html")
        text = (tmp_path / "r.html").read_text()
        assert parse_page(text).images == []
        assert "the scanned folder was not given" in text

    def test_thumbnail_refuses_paths_outside_root(self, dataset):
        """A manifest path that climbs out of root is never opened."""
        root, _ = dataset
        assert page.thumbnail(root / "cat", "../cat/chelsea.png") is None
        assert page.thumbnail(root, "cat/chelsea.png").startswith("data:image/jpeg;base64,")


def test_report_command(dataset, tmp_path):
    """`labelprep report MANIFEST --json --markdown --html` writes all three and prints the table."""
    from click.testing import CliRunner

    from labelprep import manifest as manifest_io
    from labelprep.cli import main

    root, m = dataset
    path = manifest_io.write(m, tmp_path / "m.csv", meta={"root": str(root), "seed": 7})
    out = {k: tmp_path / f"r.{k}" for k in ("json", "md", "html")}
    result = CliRunner().invoke(main, ["report", str(path), "--json", str(out["json"]),
                                       "--markdown", str(out["md"]), "--html", str(out["html"])])
    assert result.exit_code == 0, result.output
    assert result.output.splitlines()[0] == f"{len(m)} files: 23 in a split, 3 left out; 3 classes"
    summary = json.loads(out["json"].read_text())
    assert summary["seed"] == 7 and summary["files"] == len(m)
    assert len(parse_page(out["html"].read_text()).images) == 6  # root came from the sidecar


def test_thumbnail_of_16_bit_grey(tmp_path):
    """A 16-bit grey image previews at its true brightness (40000 / 65535 of white is about 156),
    not clipped to white."""
    Image.fromarray(np.full((30, 40), 40000, dtype=np.uint16)).save(tmp_path / "deep.png")
    uri = page.thumbnail(tmp_path, "deep.png")
    with Image.open(io.BytesIO(base64.b64decode(uri.split(",", 1)[1]))) as im:
        assert abs(float(np.asarray(im.convert("L"), dtype=float).mean()) - 40000 / 257) < 2


def test_no_thumbnail_for_faulty_files(dataset, tmp_path):
    """A member whose scan recorded a decoding fault is listed with a placeholder, not decoded."""
    root, m = dataset
    m = m.assign(fault=np.where(m["path"] == "cat/chelsea_small.jpg", "truncated", ""))
    reports.report(m, html=tmp_path / "r.html", root=root)
    text = (tmp_path / "r.html").read_text()
    assert len(parse_page(text).images) == 5
    assert re.search(r'<div class="blank">no preview</div>\s*<figcaption>cat/chelsea_small.jpg', text)
