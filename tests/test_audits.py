"""Tests of labelprep.audits: leaks across splits, class balance, terminal text, the CLI command."""

from __future__ import annotations

import json
from itertools import combinations

import numpy as np
import pandas as pd
import pytest

from labelprep.audits import audit, audit_path, leak_gate, render
from labelprep.cli import main
from labelprep.errors import GateFailed, InputError, ParameterError
from labelprep.manifest import write
from labelprep.splits import split


def hamming(a: str, b: str) -> int:
    """Hamming distance of two hex hashes: bits that differ (Hamming 1950), by Python ints."""
    return bin(int(a, 16) ^ int(b, 16)).count("1")


def random_manifest(n=80, seed=0):
    """Hashes in clusters (a base hash and copies with a few flipped bits), random splits."""
    rng = np.random.default_rng(seed)
    bases = rng.integers(0, 2**63, 12, dtype=np.int64).astype(np.uint64)
    hashes = []
    for _ in range(n):
        h = int(bases[rng.integers(0, bases.size)])
        for bit in rng.choice(64, int(rng.integers(0, 12)), replace=False):
            h ^= 1 << int(bit)
        hashes.append(f"{h:016x}")
    return pd.DataFrame({
        "path": [f"p/{i:04d}.jpg" for i in range(n)],
        "label": rng.choice(["cat", "dog"], n),
        "split": rng.choice(["train", "val", "test", ""], n, p=[0.6, 0.15, 0.15, 0.1]),
        "group": rng.choice(["", "", "s1", "s2", "s3"], n),
        "phash": hashes,
        "sha256": [f"{i:064x}" for i in range(n)],
    })


class TestNearLeaks:
    def test_pairs_equal_brute_force(self):
        """Every pair in different (non-empty) splits within the radius, nothing else."""
        m = random_manifest()
        result = audit(m, max_distance=6)
        expected = set()
        rows = m[m["split"] != ""].sort_values("path")
        for (_, a), (_, b) in combinations(rows.iterrows(), 2):
            d = hamming(a["phash"], b["phash"])
            if a["split"] != b["split"] and d <= 6:
                expected.add((a["path"], b["path"], d))
        found = {(p["path_a"], p["path_b"], p["distance"]) for p in result["near_leaks"]}
        assert found == expected
        assert len(expected) > 0
        keys = [(p["path_a"], p["path_b"]) for p in result["near_leaks"]]
        assert keys == sorted(keys)

    def test_pair_fields(self):
        """A pair names both files' label and split."""
        m = pd.DataFrame({"path": ["x.png", "y.png"], "label": ["cat", "dog"], "split": ["val", "train"],
                          "phash": ["0000000000000000", "0000000000000007"], "sha256": ["a" * 64, "b" * 64]})
        (pair,) = audit(m, max_distance=3)["near_leaks"]
        assert pair == {"path_a": "x.png", "path_b": "y.png", "label_a": "cat", "label_b": "dog",
                        "split_a": "val", "split_b": "train", "distance": 3, "exact": False}
        assert audit(m, max_distance=2)["near_leaks"] == []

    def test_exact_copies_count_without_a_hash(self):
        """Byte-identical files in two splits leak even when neither could be decoded."""
        m = pd.DataFrame({"path": ["a", "b", "c"], "label": ["x"] * 3, "split": ["train", "test", "train"],
                          "phash": ["", "", ""], "sha256": ["s" * 64, "s" * 64, "s" * 64]})
        result = audit(m)
        pairs = {(p["path_a"], p["path_b"]) for p in result["near_leaks"]}
        assert pairs == {("a", "b"), ("b", "c")}
        assert all(p["exact"] and p["distance"] == 0 for p in result["near_leaks"])

    def test_exact_copy_found_by_both_ways_is_listed_once(self):
        """Same sha256 and same phash: one pair, marked exact."""
        m = pd.DataFrame({"path": ["a", "b"], "label": ["x", "x"], "split": ["train", "val"],
                          "phash": ["00000000000000ff"] * 2, "sha256": ["s" * 64] * 2})
        assert [p["exact"] for p in audit(m)["near_leaks"]] == [True]

    def test_split_made_by_labelprep_has_no_leaks(self):
        """After split() on a manifest whose clusters are in dup_group, the audit finds none."""
        m = random_manifest(n=60, seed=3).drop(columns=["split"])
        # clusters as the group stage would find them: connected pairs within the radius
        parent = list(range(len(m)))
        for i, j in combinations(range(len(m)), 2):
            if hamming(m.at[i, "phash"], m.at[j, "phash"]) <= 8:
                ri, rj = i, j
                while parent[ri] != ri:
                    ri = parent[ri]
                while parent[rj] != rj:
                    rj = parent[rj]
                parent[ri] = rj

        def root(i):
            while parent[i] != i:
                i = parent[i]
            return i

        m["dup_group"] = pd.array([root(i) for i in range(len(m))], dtype="Int64")
        m["issues"] = ""
        result = audit(split(m, seed=1), max_distance=8)
        assert result["near_leaks"] == [] and result["group_leaks"] == []
        assert result["leaking_files"] == 0


class TestGroupLeaks:
    def test_groups_in_two_splits_are_listed(self):
        """Group s1 sits in train and test; s2 only in val; ungrouped rows never count."""
        m = pd.DataFrame({"path": ["a", "b", "c", "d", "e"], "label": ["x"] * 5,
                          "split": ["train", "test", "train", "val", "test"],
                          "group": ["s1", "s1", "s1", "s2", ""]})
        result = audit(m)
        assert result["group_leaks"] == [{"group": "s1", "splits": {"train": 2, "test": 1},
                                          "paths": {"train": ["a", "c"], "test": ["b"]}}]
        assert result["leaking_files"] == 3


class TestBalanceAndColumns:
    def test_balance_matches_a_crosstab(self):
        """Class counts per split equal pandas' crosstab of the same columns."""
        m = random_manifest(seed=2)
        balance = audit(m)["balance"]
        table = pd.crosstab(m["split"].replace("", "unassigned"), m["label"])
        for name in ("train", "val", "test"):
            assert balance["splits"][name]["counts"] == table.loc[name].to_dict()

    def test_given_split_is_used_when_split_is_empty(self):
        """A scanned split/class layout (given_split) is audited when no split was made."""
        m = pd.DataFrame({"path": ["a", "b"], "label": ["x", "x"], "split": ["", ""],
                          "given_split": ["train", "test"], "sha256": ["s" * 64] * 2})
        result = audit(m)
        assert result["split_column"] == "given_split"
        assert len(result["near_leaks"]) == 1
        assert audit(m, split_column="split")["rows"] == 0

    def test_nothing_to_audit(self):
        m = pd.DataFrame({"path": ["a"], "label": ["x"], "split": [""]})
        with pytest.raises(ParameterError, match="nothing to audit"):
            audit(m)

    @pytest.mark.parametrize("kwargs, error, match", [
        ({"max_distance": 65}, ParameterError, "0 to 64"),
        ({"max_distance": 2.5}, TypeError, "int"),
        ({"split_column": "nope"}, InputError, "'nope'"),
        ({"split_column": 3}, TypeError, "str"),
    ])
    def test_bad_options(self, kwargs, error, match):
        m = pd.DataFrame({"path": ["a"], "label": ["x"], "split": ["train"]})
        with pytest.raises(error, match=match):
            audit(m, **kwargs)


class TestRender:
    def test_text_lists_pairs_groups_and_balance(self):
        m = random_manifest()
        result = audit(m, max_distance=6)
        text = render(result, limit=2)
        assert f"near-duplicate pairs across splits: {len(result['near_leaks'])}" in text
        assert f"... and {len(result['near_leaks']) - 2} more" in text
        assert "groups across splits:" in text
        assert "class balance" in text and "cat" in text and "chi-square" in text

    def test_bad_limit(self):
        with pytest.raises(ParameterError):
            render(audit(random_manifest()), limit=-1)


class TestCommand:
    def test_fail_on_leaks_exits_1_and_writes_json(self, tmp_path, runner):
        """`labelprep audit M --fail-on leaks --json F` exits 1 on a leak and writes the result."""
        from labelprep.cli import main

        m = random_manifest()
        write(m, tmp_path / "m.csv")
        out = tmp_path / "audit.json"
        res = runner.invoke(main, ["audit", str(tmp_path / "m.csv"), "--fail-on", "leaks",
                                   "--json", str(out), "--max-distance", "6"])
        assert res.exit_code == 1, res.output
        saved = json.loads(out.read_text())
        assert saved["near_leaks"] == audit(m, max_distance=6)["near_leaks"]
        clean = m.assign(split="train")
        write(clean, tmp_path / "clean.csv")
        res = runner.invoke(main, ["audit", str(tmp_path / "clean.csv"), "--fail-on", "leaks"])
        assert res.exit_code == 0, res.output

    def test_audit_of_a_split_folder_layout(self, tmp_path, runner, write_image):
        """A ROOT/<split>/<label> tree is scanned and its byte-identical copy across splits found."""
        from labelprep.cli import main

        root = tmp_path / "data"
        write_image(root / "train" / "cat" / "a.jpg", seed=1)
        write_image(root / "train" / "dog" / "b.jpg", seed=2)
        (root / "test" / "cat").mkdir(parents=True)
        (root / "test" / "cat" / "a_copy.jpg").write_bytes((root / "train" / "cat" / "a.jpg").read_bytes())
        res = runner.invoke(main, ["audit", str(root), "--fail-on", "leaks",
                                   "--json", str(tmp_path / "a.json")])
        assert res.exit_code == 1, res.output
        saved = json.loads((tmp_path / "a.json").read_text())
        assert saved["split_column"] == "given_split"
        assert [(p["path_a"], p["path_b"], p["exact"]) for p in saved["near_leaks"]] == [
            ("test/cat/a_copy.jpg", "train/cat/a.jpg", True)]


class TestLibraryEntry:
    """What the command does, through the library: a folder or a manifest, and the gate."""

    def test_folder_is_scanned_in_memory_and_gated(self, tmp_path, write_image):
        root = tmp_path / "data"
        write_image(root / "train" / "cat" / "a.jpg", seed=1)
        (root / "test" / "cat").mkdir(parents=True)
        (root / "test" / "cat" / "b.jpg").write_bytes((root / "train" / "cat" / "a.jpg").read_bytes())
        before = sorted(p.name for p in tmp_path.rglob("*"))
        result = audit_path(root, jobs=1)
        assert sorted(p.name for p in tmp_path.rglob("*")) == before  # nothing written beside it
        assert [(p["path_a"], p["path_b"]) for p in result["near_leaks"]] == [("test/cat/b.jpg", "train/cat/a.jpg")]
        with pytest.raises(GateFailed, match="1 near-duplicate pairs and 0 groups"):
            leak_gate(result, "leaks")
        leak_gate(result, "never")
        with pytest.raises(ParameterError, match="fail_on='sometimes'"):
            leak_gate(result, "sometimes")

    def test_manifest_file_is_read(self, tmp_path):
        m = random_manifest()
        write(m, tmp_path / "m.csv")
        assert audit_path(tmp_path / "m.csv", max_distance=6) == audit(m, max_distance=6)


class TestAgreesWithGroup:
    """audit links near-duplicates as group does (labelprep.clusters.near_links), so prepare
    followed by ``audit --fail-on leaks`` passes on prepare's own output (issue 17: audit's own
    whole-image pHash radius reported leaks group had not linked, on digits 4 files of 875)."""

    @staticmethod
    def _prepare_then_audit(runner, root, out, *extra):
        result = runner.invoke(main, ["prepare", str(root), "--out", str(out), "-j", "1", "-q", *extra])
        assert result.exit_code == 0, result.output
        result = runner.invoke(main, ["audit", str(out / "manifest.csv"), "--fail-on", "leaks", "-q"])
        assert result.exception is None or isinstance(result.exception, SystemExit), result.exception
        return result

    def test_on_scikit_learns_digits(self, runner, tmp_path):
        """Low-detail images, the case where a plain pHash radius and group disagree most: 400
        of scikit-learn's bundled 8x8 digits (an open dataset), upsampled to 64x64, by class."""
        from PIL import Image
        from sklearn.datasets import load_digits

        digits = load_digits()
        root = tmp_path / "digits"
        for k in range(400):
            folder = root / str(digits.target[k])
            folder.mkdir(parents=True, exist_ok=True)
            pixels = (digits.images[k] * 255 / 16).astype(np.uint8)
            Image.fromarray(pixels).resize((64, 64), Image.Resampling.BILINEAR).save(folder / f"d{k:04d}.png")
        result = self._prepare_then_audit(runner, root, tmp_path / "out")
        assert result.exit_code == 0, result.output

    def test_on_the_class_tree(self, runner, class_tree, tmp_path):
        assert self._prepare_then_audit(runner, class_tree, tmp_path / "out").exit_code == 0

    def test_on_the_demo(self, runner, demo_tree, tmp_path):
        from labelprep.demo import GROUP_PATTERN

        result = self._prepare_then_audit(runner, demo_tree, tmp_path / "out", "--group-pattern", GROUP_PATTERN)
        assert result.exit_code == 0, result.output

    def test_on_the_demo_grouped_without_mirrors_and_a_small_radius(self, runner, demo_tree, tmp_path):
        """The audit takes the link options the manifest was grouped with from its sidecar, so
        `prepare --no-flips --max-distance 4` is audited with the same links."""
        from labelprep.demo import GROUP_PATTERN

        out = tmp_path / "out"
        result = self._prepare_then_audit(runner, demo_tree, out, "--group-pattern", GROUP_PATTERN,
                                          "--no-flips", "--max-distance", "4")
        assert result.exit_code == 0, result.output
        assert audit_path(out / "manifest.csv")["max_distance"] == 4
        assert audit_path(out / "manifest.csv", max_distance=6)["max_distance"] == 6
