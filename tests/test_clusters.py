"""labelprep.clusters.group: exact and near copies, union-find, conflicts, keepers, bundles."""

import io

import numpy as np
import pandas as pd
import pytest
import skimage.data
from PIL import Image, ImageDraw

from labelprep.clusters import group
from labelprep.errors import InputError, ParameterError
from labelprep.hashing import fingerprint


def manifest(rows):
    """A manifest from dicts; missing text columns empty, one distinct sha256 per row."""
    m = pd.DataFrame(rows)
    if "sha256" not in m:
        m["sha256"] = [f"sha-{k}" for k in range(len(m))]
    for column in ("label", "group", "issues"):
        if column not in m:
            m[column] = ""
    return m


def flip(value: int, *bits) -> str:
    """16-hex-digit hash of value with the given bits flipped."""
    for b in bits:
        value ^= 1 << b
    return f"{value:016x}"


BASE = 0x0123_4567_89AB_CDEF


def cluster_sets(out):
    """Clusters as a set of frozensets of paths (independent of id numbering)."""
    clustered = out[out["dup_group"].notna()]
    return {frozenset(g["path"]) for _, g in clustered.groupby("dup_group")}


class TestLinks:
    def test_exact_copies_by_sha256_even_without_phash(self):
        """Byte-identical files cluster by digest alone; an undecodable file has no phash."""
        m = manifest([{"path": "a.jpg", "sha256": "d1", "phash": ""},
                      {"path": "b.jpg", "sha256": "d1", "phash": ""},
                      {"path": "c.jpg", "sha256": "d2", "phash": ""}])
        out = group(m)
        assert cluster_sets(out) == {frozenset({"a.jpg", "b.jpg"})}
        assert out["issues"].tolist() == ["exact-copy", "exact-copy", ""]

    def test_near_copy_within_radius_only(self):
        m = manifest([{"path": "a", "phash": flip(BASE)},
                      {"path": "b", "phash": flip(BASE, 1, 2, 3, 4, 5)},
                      {"path": "c", "phash": flip(BASE, *range(10, 30))}])
        assert cluster_sets(group(m, max_distance=5)) == {frozenset({"a", "b"})}
        assert cluster_sets(group(m, max_distance=4)) == set()
        assert group(m, max_distance=5)["issues"].tolist() == ["near-copy", "near-copy", ""]

    def test_a_chain_does_not_become_one_cluster(self):
        """A chain d-b-c-a, each step 6 bits, ends 18 bits apart: at radius 6 the star rule
        keeps the end that is not verified against the anchor out, and every member's
        linked_to is its cluster's anchor, within the radius of it."""
        chain = [flip(BASE, *range(0, k)) for k in (0, 6, 12, 18)]
        m = manifest([{"path": p, "phash": h} for p, h in zip("dbca", chain)])
        out = group(m, max_distance=6).set_index("path")
        assert cluster_sets(out.reset_index()) == {frozenset("bcd")}
        assert out.loc[["c", "d"], "linked_to"].tolist() == ["b", "b"]
        assert out.loc["b", "linked_to"] == "" and out.loc["a", "linked_to"] == ""
        hashes = dict(zip("dbca", chain))
        for member in "cd":
            assert bin(int(hashes[member], 16) ^ int(hashes["b"], 16)).count("1") <= 6

    def test_no_cluster_holds_two_members_further_than_two_links(self):
        """A long chain of 40 hashes, 4 bits a step: clusters never span more than 2 links
        (8 bits), where single linkage would make one cluster of all 40."""
        chain = [flip(BASE, *range(0, 4 * k)) for k in range(16)] + \
            [flip(~BASE & (2**64 - 1), *range(0, 4 * k)) for k in range(16)]
        m = manifest([{"path": f"p{k:02d}", "phash": h} for k, h in enumerate(chain)])
        out = group(m, max_distance=4)
        for _, members in out[out["dup_group"].notna()].groupby("dup_group"):
            values = [int(h, 16) for h in members["phash"]]
            assert max(bin(x ^ y).count("1") for x in values for y in values) <= 8
            assert len(members) <= 3

    def test_exact_and_near_in_one_cluster(self):
        """An exact copy of a near copy joins the same cluster; both codes where they apply."""
        m = manifest([{"path": "a", "sha256": "x", "phash": flip(BASE)},
                      {"path": "b", "sha256": "x", "phash": flip(BASE)},
                      {"path": "c", "sha256": "y", "phash": flip(BASE, 7)}])
        out = group(m)
        assert cluster_sets(out) == {frozenset("abc")}
        assert out["issues"].tolist() == ["exact-copy;near-copy", "exact-copy;near-copy", "near-copy"]


class TestConflictsKeepersBundles:
    def test_label_conflict_marks_every_member(self):
        m = manifest([{"path": "a", "label": "cat", "phash": flip(BASE)},
                      {"path": "b", "label": "dog", "phash": flip(BASE, 1)},
                      {"path": "c", "label": "", "phash": flip(BASE, 2)},
                      {"path": "d", "label": "cat", "phash": flip(~BASE & (2**64 - 1))}])
        out = group(m)
        assert out["issues"].tolist() == ["label-conflict;near-copy"] * 3 + [""]
        assert out["mixed_labels"].tolist() == [True, True, True, False]

    def test_unknown_label_is_no_conflict(self):
        m = manifest([{"path": "a", "label": "cat", "phash": flip(BASE)},
                      {"path": "b", "label": "", "phash": flip(BASE, 1)}])
        assert group(m)["issues"].tolist() == ["near-copy", "near-copy"]

    def test_keep_conflicts(self):
        m = manifest([{"path": "a", "label": "cat", "phash": flip(BASE)},
                      {"path": "b", "label": "dog", "phash": flip(BASE, 1)}])
        out = group(m, keep_conflicts=True)
        assert out["issues"].tolist() == ["near-copy", "near-copy"]
        assert out["mixed_labels"].all()

    def test_keeper_rule(self):
        """Most pixels first, then most bytes, then the first path; singletons keep themselves."""
        rows = [{"path": "z_big", "width": 200, "height": 100, "bytes": 10},
                {"path": "a_small", "width": 100, "height": 100, "bytes": 999},
                {"path": "m_tie_more_bytes", "width": 100, "height": 50, "bytes": 50},
                {"path": "b_tie", "width": 50, "height": 100, "bytes": 40},
                {"path": "c_tie", "width": 50, "height": 100, "bytes": 40},
                {"path": "lonely", "width": 1, "height": 1, "bytes": 1}]
        hashes = [BASE, BASE, BASE ^ 0xFF00, BASE ^ 0xFF00, BASE ^ 0xFF00, ~BASE & (2**64 - 1)]
        for row, h in zip(rows, hashes):
            row["phash"] = f"{h:016x}"
        out = group(manifest(rows), max_distance=4).set_index("path")["keeper"]
        assert out.to_dict() == {"z_big": True, "a_small": False, "m_tie_more_bytes": True,
                                 "b_tie": False, "c_tie": False, "lonely": True}
        rows[3]["bytes"] = rows[4]["bytes"] = 50
        rows[2]["bytes"] = 50
        out = group(manifest(rows), max_distance=4).set_index("path")["keeper"]
        assert out["b_tie"] and not out["c_tie"] and not out["m_tie_more_bytes"]

    def test_bundle_joins_clusters_and_user_groups(self):
        """a~b are copies, b and c share a user group, d is alone: bundles {a,b,c} and {d}."""
        m = manifest([{"path": "a", "group": "", "phash": flip(BASE)},
                      {"path": "b", "group": "s1", "phash": flip(BASE, 3)},
                      {"path": "c", "group": "s1", "phash": flip(BASE, *range(20, 40))},
                      {"path": "d", "group": "s2", "phash": flip(BASE, *range(40, 64))}])
        out = group(m)
        assert out["bundle"].tolist() == [0, 0, 0, 1]
        assert cluster_sets(out) == {frozenset("ab")}


class TestDeterminism:
    def rows(self):
        rng = np.random.default_rng(5)
        base = rng.integers(0, 2**63, 12)
        rows = []
        for k in range(36):
            h = int(base[k % 12]) ^ (1 << int(rng.integers(0, 64)))
            rows.append({"path": f"img{k:02d}.png", "label": "ab"[k % 2],
                         "group": f"g{k % 5}" if k % 3 == 0 else "", "phash": f"{h:016x}",
                         "width": 10, "height": 10, "bytes": int(rng.integers(1, 99))})
        return manifest(rows)

    def test_independent_of_row_order(self):
        """Shuffled input: every row gets the same ids, codes and keeper flag."""
        m = self.rows()
        first = group(m).set_index("path").sort_index()
        shuffled = group(m.sample(frac=1, random_state=3)).set_index("path").sort_index()
        pd.testing.assert_frame_equal(first, shuffled)

    def test_ids_numbered_by_first_path_and_rerun_is_stable(self):
        m = self.rows()
        out = group(m)
        ids = out.sort_values("path")["dup_group"].dropna().drop_duplicates().tolist()
        assert ids == list(range(len(ids)))
        pd.testing.assert_frame_equal(group(out), out)

    def test_other_stages_codes_are_kept(self):
        m = manifest([{"path": "a", "phash": flip(BASE), "issues": "too-small"},
                      {"path": "b", "phash": flip(BASE), "issues": "near-copy"}])
        m.loc[1, "phash"] = flip(BASE, *range(30))
        assert group(m)["issues"].tolist() == ["too-small", ""]


def _fingerprinted(images):
    return manifest([{"path": name, **fingerprint(img)} for name, img in images.items()])


class TestRealImages:
    def test_upsampled_digits_do_not_form_false_clusters(self):
        """scikit-learn's 1797 bundled digits upsampled to 64x64 are distinct images. Plain pHash
        at 8 bits links about a third of them, the largest cluster over 100 (issue 4 measured
        ~145); with the defaults almost none link, while JPEG copies still join."""
        from sklearn.datasets import load_digits

        def up(a):
            return Image.fromarray((a * 255 / 16).astype(np.uint8)).resize((64, 64), Image.Resampling.BILINEAR)

        digits = load_digits().images
        images = {f"d{k:04d}": up(a) for k, a in enumerate(digits)}
        copied = range(0, len(digits), 20)
        for k in copied:  # JPEG re-encodes at quality 90
            buf = io.BytesIO()
            images[f"d{k:04d}"].save(buf, "JPEG", quality=90)
            images[f"d{k:04d}-copy"] = Image.open(io.BytesIO(buf.getvalue()))
        m = _fingerprinted(images)
        originals = ~m["path"].str.endswith("-copy")

        def linked(out):
            sizes = out.loc[originals].groupby("dup_group").size()
            return sizes.max(), sizes[sizes > 1].sum()

        _, count = linked(group(m[["path", "sha256", "phash"]], max_distance=8))
        assert count > len(digits) / 3
        out = group(m)
        largest, count = linked(out)
        assert largest <= 3 and count <= 0.01 * len(digits)
        dup = out.set_index("path")["dup_group"]
        found = [pd.notna(dup[f"d{k:04d}"]) and dup[f"d{k:04d}"] == dup[f"d{k:04d}-copy"]
                 for k in copied]
        assert np.mean(found) >= 0.95

    def test_caption_on_textures_is_not_a_match(self):
        """scikit-image's brick and grass textures, each with the same caption box pasted in
        the lower-left corner: the caption brings their pHashes within 8 bits, the pixels keep
        them apart. (A caption over 3% of the picture is a large local difference: the
        captioned copy does not join its original either; the README says so.)"""
        def caption(img):
            out = img.convert("RGB")
            w, h = out.size
            ImageDraw.Draw(out).rectangle((int(w * .03), int(h * .86), int(w * .33), int(h * .97)),
                                          fill=(255, 255, 255))
            return out

        brick = Image.fromarray(skimage.data.brick())
        grass = Image.fromarray(skimage.data.grass())
        m = _fingerprinted({"brick": brick, "brick-cap": caption(brick),
                            "grass": grass, "grass-cap": caption(grass)})
        caps = m.set_index("path")["phash"]
        assert bin(int(caps["brick-cap"], 16) ^ int(caps["grass-cap"], 16)).count("1") <= 8
        assert not any({"brick-cap", "grass-cap"} <= members for members in cluster_sets(group(m)))


class TestParameters:
    def test_bad_values(self):
        m = manifest([{"path": "a", "phash": flip(BASE)}])
        with pytest.raises(ParameterError, match="max_distance=65"):
            group(m, max_distance=65)
        with pytest.raises(TypeError, match="max_distance must be an int"):
            group(m, max_distance="8")
        with pytest.raises(TypeError, match="keep_conflicts must be True or False"):
            group(m, keep_conflicts=1)
        with pytest.raises(InputError, match="sha256"):
            group(pd.DataFrame({"path": ["a"]}))
        with pytest.raises(TypeError, match="DataFrame"):
            group([1, 2])

    def test_empty_manifest(self):
        out = group(manifest([]).reindex(columns=["path", "sha256", "phash", "label", "issues"]))
        assert len(out) == 0 and "dup_group" in out and "bundle" in out

    def test_progress_is_called(self):
        seen = []

        def progress(iterable, total, label):
            seen.append((total, label))
            return iterable

        rows = [{"path": f"p{k}", "phash": f"{k * 0x9E3779B97F4A7C15 % 2**64:016x}"} for k in range(30000)]
        group(manifest(rows), progress=progress)
        assert seen and seen[0][1] == "near-duplicate search"


def _photo_rows():
    """scikit-image's camera photo, a JPEG re-encode, a mirrored copy and the coffee photo."""
    camera = Image.fromarray(skimage.data.camera())
    buf = io.BytesIO()
    camera.save(buf, "JPEG", quality=70)
    return {"camera.png": camera, "camera-jpeg.jpg": Image.open(buf),
            "camera-mirror.png": camera.transpose(Image.Transpose.FLIP_LEFT_RIGHT),
            "coffee.png": Image.fromarray(skimage.data.coffee())}


class TestVerifiedLinks:
    def test_copies_verified_different_photo_not(self):
        """On real photos (scikit-image's camera and coffee) the JPEG and the mirrored copy are
        verified links with their evidence; coffee links to nothing."""
        from labelprep.clusters import verified_links

        m = _fingerprinted(_photo_rows())
        links = verified_links(m)
        pairs = {(m["path"][a], m["path"][b]): kind for a, b, kind in zip(links["first"], links["second"], links["kind"])}
        assert pairs[("camera.png", "camera-jpeg.jpg")] == "near"
        assert pairs[("camera.png", "camera-mirror.png")] == "mirror"
        assert not any("coffee.png" in pair for pair in pairs)
        assert (links["likeness"] > 0.95).all() and (links["blemish"] < 0.3).all()
        no_mirror = verified_links(m, flips=False)
        assert "mirror" not in set(no_mirror["kind"])

    def test_group_records_the_link_of_each_member(self):
        out = group(_fingerprinted(_photo_rows())).set_index("path")
        assert out.loc["camera-jpeg.jpg", "link_kind"] in ("near", "")
        members = out[out["dup_group"].notna()]
        assert set(members.index) == {"camera.png", "camera-jpeg.jpg", "camera-mirror.png"}
        anchor = members.index[members["linked_to"] == ""][0]
        assert set(members.loc[members.index != anchor, "linked_to"]) == {anchor}
        assert pd.isna(out.loc["coffee.png", "dup_group"])

    def test_no_flips_leaves_the_mirrored_copy_out(self):
        out = group(_fingerprinted(_photo_rows()), flips=False).set_index("path")
        assert pd.isna(out.loc["camera-mirror.png", "dup_group"])
        assert out.loc["camera.png", "dup_group"] == out.loc["camera-jpeg.jpg", "dup_group"]

    def test_mirrored_pair_under_two_labels_is_not_a_label_conflict(self):
        """A mirrored copy filed under another label (left/right classes) is reported as
        mirrored-label, a warning, not as label-conflict."""
        m = _fingerprinted(_photo_rows())
        m["label"] = ["left", "left", "right", "cup"]  # sorted by path: camera-jpeg, camera-mirror, camera, coffee
        m["label"] = m["path"].map({"camera.png": "left", "camera-jpeg.jpg": "left",
                                    "camera-mirror.png": "right", "coffee.png": "cup"})
        out = group(m).set_index("path")
        assert "mirrored-label" in out.loc["camera-mirror.png", "issues"]
        assert not out["issues"].str.contains("label-conflict").any()
        # an ordinary copy under another label is still a conflict
        m.loc[m["path"] == "camera-jpeg.jpg", "label"] = "right"
        assert group(m).set_index("path").loc["camera.png", "issues"].count("label-conflict") == 1


class TestGivenLinks:
    def rows(self):
        return manifest([{"path": p, "phash": flip(BASE, *range(k))} for p, k in
                         (("a", 0), ("b", 3), ("c", 40), ("d", 44))])

    def test_join_and_separate(self):
        """A join links two rows the hashes would not; a separate removes a hash link and keeps
        the two out of one cluster."""
        m = self.rows()
        assert cluster_sets(group(m)) == {frozenset("ab"), frozenset("cd")}
        decisions = pd.DataFrame({"path": ["a", "c"], "other": ["c", "d"], "action": ["join", "separate"]})
        out = group(m, links=decisions).set_index("path")
        assert cluster_sets(out.reset_index()) == {frozenset("abc")}
        assert out.loc["c", "link_kind"] == "given"
        assert pd.isna(out.loc["d", "dup_group"])

    def test_separate_holds_inside_a_star(self):
        """Two rows both verified against one anchor but separated never share its cluster."""
        m = manifest([{"path": p, "phash": flip(BASE, *bits)} for p, bits in
                      (("a", ()), ("b", (1, 2)), ("c", (5, 6)))])
        out = group(m, max_distance=4, links=pd.DataFrame({"path": ["b"], "other": ["c"], "action": ["separate"]}))
        assert all(not {"b", "c"} <= members for members in cluster_sets(out))

    def test_bad_links(self):
        m = self.rows()
        with pytest.raises(ParameterError, match="not in the manifest: 'zz'"):
            group(m, links=pd.DataFrame({"path": ["a"], "other": ["zz"], "action": ["join"]}))
        with pytest.raises(ParameterError, match="'merge'"):
            group(m, links=pd.DataFrame({"path": ["a"], "other": ["b"], "action": ["merge"]}))
        with pytest.raises(ParameterError, match="action"):
            group(m, links=pd.DataFrame({"path": ["a"], "other": ["b"]}))
        with pytest.raises(TypeError, match="links must be"):
            group(m, links=[("a", "b")])


def test_group_command_no_flips(runner, tmp_path):
    """`labelprep group --no-flips` writes what group(flips=False) returns; the default matches
    mirrored copies."""
    from labelprep import manifest as manifest_io
    from labelprep.cli import main

    m = _fingerprinted(_photo_rows())
    target = tmp_path / "m.csv"
    manifest_io.write(m, target)
    assert runner.invoke(main, ["group", str(target), "-q"]).exit_code == 0
    assert manifest_io.read(target).set_index("path").loc["camera-mirror.png", "link_kind"] != ""
    assert runner.invoke(main, ["group", str(target), "-q", "--no-flips"]).exit_code == 0
    written = manifest_io.read(target)
    expected = group(m, flips=False)
    assert written["dup_group"].tolist() == expected["dup_group"].tolist()
