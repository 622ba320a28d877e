"""What a first-time user tripped over (issue 18), each scenario re-run as the report gave it.

Every test builds the tree the report describes in ``tmp_path`` and drives the command line
through CliRunner (or a subprocess where a real signal is needed).
"""

from __future__ import annotations

import csv
import json
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from PIL import Image

from labelprep.cli import main

from conftest import encode, textured


def _tiny_tree(root: Path, classes=("a", "b", "c"), per_class=10, side=28) -> Path:
    """Class folders of ``side`` x ``side`` PNGs, as the 28x28 digits of the report."""
    rng = np.random.default_rng(0)
    for label in classes:
        (root / label).mkdir(parents=True, exist_ok=True)
        for k in range(per_class):
            Image.fromarray(rng.integers(0, 255, (side, side, 3), dtype=np.uint8)).save(root / label / f"{k}.png")
    return root


def _photo_tree(root: Path, counts: dict, start: int = 0, prefix: str = "") -> Path:
    """``root/<label>/<prefix><label>_<k>.jpg``: perceptually distinct textures, ``counts[label]`` each."""
    seed = start
    for label, n in counts.items():
        (root / label).mkdir(parents=True, exist_ok=True)
        for k in range(n):
            (root / label / f"{prefix}{label}_{k}.jpg").write_bytes(encode(textured((96, 64), seed)))
            seed += 1
    return root


def _prepare(runner, root, out, *args):
    return runner.invoke(main, ["prepare", str(root), "--out", str(out), "-j", "1", *args])


def _manifest(path) -> pd.DataFrame:
    from labelprep.manifest import read

    return read(path)


# ---------------------------------------------------------------- 1. traceback instead of a message

class TestNothingInASplit:
    def test_export_says_why_nothing_is_exported(self, runner, tmp_path):
        """Exporting a manifest where every file is too-small is a one-line error naming the code."""
        root = _tiny_tree(tmp_path / "digits")
        assert _prepare(runner, root, tmp_path / "out", "-q").exit_code == 0
        result = runner.invoke(main, ["export", str(tmp_path / "out/manifest.csv"), str(tmp_path / "dest")])
        assert result.exit_code == 2, result.output
        assert not isinstance(result.exception, AttributeError)
        assert "Traceback" not in result.output
        assert "no file of the manifest is in a split" in result.output
        assert "too-small 30" in result.output and "--min-side" in result.output


# ---------------------------------------------------------------- 2. everything left out, exit 0, no hint

class TestEmptySplits:
    def test_all_left_out_is_loud_and_names_the_option(self, runner, tmp_path):
        """prepare on 28x28 images warns that no file reached a split and names --min-side."""
        root = _tiny_tree(tmp_path / "digits")
        result = _prepare(runner, root, tmp_path / "out")
        assert result.exit_code == 0, result.output
        assert "warning: no file reached a split: all 30 files are left out (too-small 30)" in result.stderr
        assert "28x28, shorter side under 32 px; a lower --min-side keeps it" in result.stdout

    def test_fail_on_empty_gates(self, runner, tmp_path):
        """--fail-on empty exits 1 when nothing reached a split; 0 when every split and class has files."""
        root = _tiny_tree(tmp_path / "digits")
        result = _prepare(runner, root, tmp_path / "out", "-q", "--fail-on", "empty")
        assert result.exit_code == 1, result.output
        assert "--fail-on empty: no file reached a split" in result.output
        good = _photo_tree(tmp_path / "photos", {"cat": 10, "dog": 10})
        ok = _prepare(runner, good, tmp_path / "out2", "-q", "--fail-on", "empty")
        assert ok.exit_code == 0, ok.output

    def test_one_class_left_out_entirely(self, runner, tmp_path):
        """A class whose files are all too small is named, with the count and the reason."""
        root = _photo_tree(tmp_path / "photos", {"cat": 10, "dog": 10})
        _tiny_tree(root, classes=("eel",), per_class=4)
        result = _prepare(runner, root, tmp_path / "out", "-q", "--fail-on", "empty")
        assert result.exit_code == 1
        assert "class eel has no file in any split: all 4 of its files are left out (too-small 4)" in result.output


# ---------------------------------------------------------------- 3. --keep-from drops old test files silently

class TestKeepFromLosses:
    def test_prepare_keep_from_reports_and_records(self, runner, tmp_path):
        """Grown set with byte copies of old test images under another class: prepare --keep-from
        prints kept/placed/moved/dropped, warns that the old test split lost files, and records
        keep_from in the sidecar."""
        root = _photo_tree(tmp_path / "photos", {"cat": 20, "dog": 20})
        assert _prepare(runner, root, tmp_path / "v1", "-q").exit_code == 0
        old = _manifest(tmp_path / "v1/manifest.csv")
        test_rows = old[old["split"] == "test"].sort_values("path").head(2)
        for k, rel in enumerate(test_rows["path"]):  # the same picture, filed under the other class
            other = "dog" if rel.startswith("cat/") else "cat"
            shutil.copy(root / rel, root / other / f"copy_{k}.jpg")
        _photo_tree(root, {"cat": 3}, start=500, prefix="new_")  # and some genuinely new files
        shutil.copy(tmp_path / "v1/manifest.csv", tmp_path / "old.csv")
        result = _prepare(runner, root, tmp_path / "v2", "--keep-from", str(tmp_path / "old.csv"))
        assert result.exit_code == 0, result.output
        # the two copies match old test files by their bytes, so they count as dropped too
        assert "kept 38 files where they were, placed 3 new, moved 0, dropped 4 (now with an error)" in result.stdout
        assert "warning: the old test split lost 2 files, now left out (label-conflict 2" in result.stderr
        meta = json.loads((tmp_path / "v2/manifest.csv.meta.json").read_text())
        assert meta["stages"]["prepare"]["options"]["keep_from"] == str(tmp_path / "old.csv")


# ---------------------------------------------------------------- 4. its own files indexed

class TestOwnFiles:
    def test_prepare_twice_into_the_root(self, runner, tmp_path, monkeypatch):
        """`labelprep prepare . --out prep` twice indexes the same files both times, no class 'prep'."""
        root = _photo_tree(tmp_path / "photos", {"cat": 10, "dog": 10})
        monkeypatch.chdir(root)
        first = runner.invoke(main, ["prepare", ".", "--out", "prep", "-q", "-j", "1"])
        assert first.exit_code == 0, first.output
        second = runner.invoke(main, ["prepare", ".", "--out", "prep", "-j", "1"])
        assert second.exit_code == 0, second.output
        m = _manifest(root / "prep/manifest.csv")
        assert len(m) == 20 and set(m["label"]) == {"cat", "dog"}
        assert "left out labelprep's own files inside the root: prep" in second.stderr

    def test_scan_leaves_out_its_manifest_and_table(self, runner, tmp_path):
        """A manifest written inside the root and a label table stored there are not indexed."""
        root = _photo_tree(tmp_path / "photos", {"cat": 4})
        rows = [{"path": f"cat/cat_{k}.jpg", "label": "cat"} for k in range(4)]
        pd.DataFrame(rows).to_csv(root / "labels.csv", index=False)
        for _ in range(2):
            result = runner.invoke(main, ["scan", str(root), "-o", str(root / "m.csv"), "-j", "1",
                                          "--labels", str(root / "labels.csv"), "--force"])
            assert result.exit_code == 0, result.output
        m = _manifest(root / "m.csv")
        assert sorted(m["path"]) == [r["path"] for r in rows]
        assert "labels.csv" in result.stderr and "m.csv" in result.stderr


# ---------------------------------------------------------------- 5. exports that shift labels

def _folder_per_class(split_dir: Path, classes=None) -> dict:
    """A folder-per-class loader as training libraries write one (torchvision's ImageFolder:
    classes are the sorted subfolder names, index = position; files found recursively), with an
    optional explicit class list as Keras' ``class_names=`` takes it."""
    names = classes if classes is not None else sorted(p.name for p in split_dir.iterdir() if p.is_dir())
    index = {name: i for i, name in enumerate(names)}
    found = {}
    for name in names:
        folder = split_dir / name
        if folder.is_dir():
            for file in sorted(folder.rglob("*")):
                if file.is_file():
                    found[file.relative_to(split_dir.parent).as_posix()] = index[name]
    return found


class TestExportAlignment:
    def test_same_class_index_in_every_split(self, runner, tmp_path):
        """A class with one image lands only in train; with classes.txt every split reads the same index."""
        root = _photo_tree(tmp_path / "photos", {"ant": 1, "bee": 12, "cat": 12})
        assert _prepare(runner, root, tmp_path / "out", "-q").exit_code == 0
        result = runner.invoke(main, ["export", str(tmp_path / "out/manifest.csv"), str(tmp_path / "dest"),
                                      "--mode", "copy"])
        assert result.exit_code == 0, result.output
        dest = tmp_path / "dest"
        assert not (dest / "val/ant").exists()  # the case that shifts a naive loader's indices
        assert "val has no folder for ant" in result.stderr and "classes.txt" in result.stderr
        classes = (dest / "classes.txt").read_text(encoding="utf-8").splitlines()
        assert classes == ["ant", "bee", "cat"]
        truth = {"ant": 0, "bee": 1, "cat": 2}
        for split in ("train", "val", "test"):
            read = _folder_per_class(dest / split, classes)
            with open(dest / f"{split}.csv", newline="", encoding="utf-8") as fh:
                listed = list(csv.DictReader(fh))
            assert read and {path: truth[row["label"]] for row in listed for path in [row["path"]]} == read
        naive = _folder_per_class(dest / "val")  # without the list, val's bee would be index 0
        assert min(naive.values()) == 0 and "ant" not in (p.split("/")[1] for p in naive)

    def test_nested_names_link_back(self, runner, tmp_path):
        """Nested subfolders keep readable names below the class folder; each list row names its source."""
        root = tmp_path / "photos"
        seed = 0
        for sub in ("2019", "2020"):
            for k in range(6):
                (root / "cat" / sub).mkdir(parents=True, exist_ok=True)
                (root / "cat" / sub / f"x{k}.jpg").write_bytes(encode(textured((96, 64), seed)))
                seed += 1
        assert _prepare(runner, root, tmp_path / "out", "-q").exit_code == 0
        assert runner.invoke(main, ["export", str(tmp_path / "out/manifest.csv"),
                                    str(tmp_path / "dest")]).exit_code == 0
        rows = []
        for split in ("train", "val", "test"):
            listed = tmp_path / "dest" / f"{split}.csv"
            if listed.exists():
                with open(listed, newline="", encoding="utf-8") as fh:
                    rows += list(csv.DictReader(fh))
        assert len(rows) == 12
        for row in rows:
            assert "~" not in row["path"]
            assert row["path"].split("/", 1)[1] == row["source"]  # split/cat/2019/x0.jpg <- cat/2019/x0.jpg
            assert (tmp_path / "dest" / row["path"]).read_bytes() == (root / row["source"]).read_bytes()


# ---------------------------------------------------------------- 6. --folds explodes

class TestFolds:
    def test_round_tries_a_linear_number_of_swaps(self, monkeypatch):
        """One improvement round tries at most _SWAP_PARTNERS pairs of folds per fold, not K(K-1)/2."""
        from labelprep import splits

        rounds, swaps = [0], [0]
        original_improve, original_swap = splits._Search.improve, splits._Search._swap_pair

        def improve(self):
            rounds[0] += self.k == 40
            return original_improve(self)

        def swap(self, *args):
            swaps[0] += self.k == 40
            return original_swap(self, *args)

        monkeypatch.setattr(splits._Search, "improve", improve)
        monkeypatch.setattr(splits._Search, "_swap_pair", swap)
        m = pd.DataFrame({"path": [f"{i:04d}.png" for i in range(200)],
                          "label": [f"c{i % 4}" for i in range(200)], "issues": ""})
        out = splits.split(m, folds=40, seed=0)
        assert rounds[0] and swaps[0] <= rounds[0] * 40 * 4  # linear: 4 partners a fold, not 39
        sizes = out["fold"].value_counts().reindex(range(40), fill_value=0)
        assert sizes.min() >= 4 and sizes.max() <= 5  # 180 train rows over 40 folds

    def test_more_folds_than_units_per_class_spread_evenly(self, runner, tmp_path):
        """With K above the units of each class, every fold still gets files (none is left empty)
        and the command warns that K exceeds the units of each class."""
        rows = pd.DataFrame({"path": [f"{i:04d}.png" for i in range(120)],
                             "label": [f"c{i % 4}" for i in range(120)], "issues": "",
                             "sha256": [f"{i:064x}" for i in range(120)]})
        from labelprep.manifest import write

        write(rows, tmp_path / "m.csv")
        result = runner.invoke(main, ["split", str(tmp_path / "m.csv"), "--folds", "50", "--ratios", "0.9,0.1"])
        assert result.exit_code == 0, result.output
        out = _manifest(tmp_path / "m.csv")
        sizes = out["fold"].value_counts().reindex(range(50), fill_value=0)
        assert sizes.min() >= 2 and sizes.max() <= 3, sizes.tolist()  # 108 train rows over 50 folds
        assert "warning: --folds 50 is more than the 27 groups, clusters or single files of class c0" in result.stderr


# ---------------------------------------------------------------- 7. audit that misleads

def _split_tree(root: Path) -> Path:
    """ROOT/<train|val|test>/<label>/ with a naive random split: 14/3/3 files of two classes."""
    seed = 0
    for split, n in (("train", 7), ("val", 2), ("test", 2)):
        for label in ("cat", "dog"):
            (root / split / label).mkdir(parents=True, exist_ok=True)
            for k in range(n):
                (root / split / label / f"{label}_{split}_{k}.jpg").write_bytes(encode(textured((96, 64), seed)))
                seed += 1
    return root


class TestAudit:
    def test_no_groups_known_and_advice(self, runner, tmp_path):
        """Without groups the audit says so; it names the split plainly and says what to do next."""
        root = _split_tree(tmp_path / "tree")
        shutil.copy(root / "train/cat/cat_train_0.jpg", root / "test/cat/leak.jpg")
        result = runner.invoke(main, ["audit", str(root), "-j", "1"])
        assert result.exit_code == 0, result.output
        assert "groups across splits: no groups known" in result.output
        assert "column 'given_split'" not in result.output
        assert "audit of the split given by the train/val/test folders" in result.output
        assert "next: " in result.output and "--group-pattern" in result.output

    def test_prepare_keeps_the_given_split(self, runner, tmp_path):
        """prepare on a split-folder tree keeps every file in its folder's split, and says so."""
        root = _split_tree(tmp_path / "tree")
        result = _prepare(runner, root, tmp_path / "out")
        assert result.exit_code == 0, result.output
        m = _manifest(tmp_path / "out/manifest.csv")
        assert (m["split"] == m["given_split"]).all()
        assert "kept the split of the train/val/test folders (--resplit splits anew)" in result.stdout
        resplit = _prepare(runner, root, tmp_path / "out2", "-q", "--resplit")
        assert resplit.exit_code == 0, resplit.output
        assert set(_manifest(tmp_path / "out2/manifest.csv")["split"]) == {"train", "val", "test"}

    def test_labels_table_with_split_folders(self, runner, tmp_path):
        """--labels on a split-folder tree: labels from the table, the given split from the folders."""
        root = tmp_path / "tree"
        rows = []
        for k, split in enumerate(["train"] * 6 + ["test"] * 2):
            (root / split).mkdir(parents=True, exist_ok=True)
            (root / split / f"img{k}.jpg").write_bytes(encode(textured((96, 64), k)))
            rows.append({"path": f"{split}/img{k}.jpg", "label": "cat" if k % 2 else "dog"})
        pd.DataFrame(rows).to_csv(tmp_path / "labels.csv", index=False)
        result = runner.invoke(main, ["scan", str(root), "-o", str(tmp_path / "m.csv"), "-j", "1",
                                      "--labels", str(tmp_path / "labels.csv")])
        assert result.exit_code == 0, result.output
        m = _manifest(tmp_path / "m.csv").set_index("path")
        assert m.loc["test/img7.jpg", "given_split"] == "test" and m.loc["test/img7.jpg", "label"] == "cat"
        assert m.loc["train/img0.jpg", "given_split"] == "train" and m.loc["train/img0.jpg", "label"] == "dog"


# ---------------------------------------------------------------- 8. near-copy lines that do not name the other file

class TestCopyLines:
    def test_every_copy_line_names_its_match(self, runner, tmp_path):
        """The issue lines of prepare name the file each copy matches."""
        root = _photo_tree(tmp_path / "photos", {"cat": 6, "dog": 6})
        original = Image.open(root / "cat/cat_0.jpg")
        original.resize((120, 80)).save(root / "cat/resized.jpg", quality=80)  # a near copy
        shutil.copy(root / "dog/dog_1.jpg", root / "dog/dog_again.jpg")  # a byte copy
        result = _prepare(runner, root, tmp_path / "out")
        assert result.exit_code == 0, result.output
        lines = result.stdout.splitlines()
        near = [line for line in lines if line.startswith("    cat/resized.jpg:")]
        assert near == ["    cat/resized.jpg: looks like cat/cat_0.jpg"], lines
        exact = [line for line in lines if line.startswith("    dog/dog_again.jpg:")]
        assert exact == ["    dog/dog_again.jpg: same bytes as dog/dog_1.jpg"], lines
        assert "not byte-identical" not in result.stdout


# ---------------------------------------------------------------- 9. silent or inconsistent messages

class TestMessages:
    def test_empty_class_folder_is_named(self, runner, tmp_path):
        """An empty class folder is reported by scan and prepare."""
        root = _photo_tree(tmp_path / "photos", {"cat": 6, "dog": 6})
        (root / "eel").mkdir()
        result = runner.invoke(main, ["scan", str(root), "-o", str(tmp_path / "m.csv"), "-j", "1"])
        assert "warning: 1 empty folders, so no class or file from them: eel" in result.stderr
        prepared = _prepare(runner, root, tmp_path / "out", "-q")
        assert "eel" in prepared.stderr

    def test_prepare_prints_skipped_hidden_files(self, runner, tmp_path):
        """prepare says which hidden and system files it skipped, as scan does."""
        root = _photo_tree(tmp_path / "photos", {"cat": 6, "dog": 6})
        (root / "cat/.DS_Store").write_bytes(b"\0" * 10)
        (root / "dog/Thumbs.db").write_bytes(b"\0" * 10)
        result = _prepare(runner, root, tmp_path / "out", "-q")
        assert "skipped 2 hidden or system files" in result.stderr and "--include-hidden" in result.stderr

    def test_ctrl_c_exits_130_and_says_a_rerun_resumes(self, runner, tmp_path, monkeypatch):
        """Ctrl-C is status 130 (the shell's 128 + SIGINT) with one line, not 'Aborted!' and 1."""
        from labelprep import scanner

        def interrupted(*args, **kwargs):
            raise KeyboardInterrupt

        monkeypatch.setattr(scanner, "scan", interrupted)
        root = _photo_tree(tmp_path / "photos", {"cat": 2})
        result = runner.invoke(main, ["scan", str(root), "-o", str(tmp_path / "m.csv")])
        assert result.exit_code == 130, result.output
        assert "Aborted!" not in result.output
        assert result.stderr.strip().splitlines() == [
            "stopped by Ctrl-C: nothing half-written was left; run the same command again to resume "
            "(files already decoded are not decoded again)"]

    def test_errors_name_the_flags(self, runner, tmp_path):
        """A bad value is reported with the option the user typed, not the Python parameter."""
        root = _photo_tree(tmp_path / "photos", {"cat": 6, "dog": 6})
        assert _prepare(runner, root, tmp_path / "out", "-q").exit_code == 0
        manifest = str(tmp_path / "out/manifest.csv")
        seed = runner.invoke(main, ["split", manifest, "--seed", "-5"])
        assert seed.exit_code == 2 and "--seed must be 0 or more, got --seed -5" in seed.output
        strip = runner.invoke(main, ["export", manifest, str(tmp_path / "dest"), "--strip-metadata"])
        assert strip.exit_code == 2 and "--strip-metadata needs --mode copy" in strip.output
        assert "strip_metadata" not in strip.output and "mode=" not in strip.output

    def test_group_help_describes_its_cluster_option(self, runner):
        """group --help speaks of the near-pair search, not of decoding or ROOT."""
        text = runner.invoke(main, ["group", "--help"]).output
        cluster = text[text.index("--cluster"):].split("\n  -", 1)[0]
        assert "near-pair search" in cluster and "decod" not in cluster and "ROOT" not in cluster

    def test_api_export_reads_root_from_the_sidecar(self, runner, tmp_path):
        """labelprep.export(manifest_path, dest) works without root=, as the command does."""
        import labelprep

        root = _photo_tree(tmp_path / "photos", {"cat": 6, "dog": 6})
        assert _prepare(runner, root, tmp_path / "out", "-q").exit_code == 0
        table = labelprep.export(tmp_path / "out/manifest.csv", tmp_path / "dest", mode="copy")
        assert len(table) == 12 and (tmp_path / "dest/classes.txt").exists()
        with pytest.raises(labelprep.ParameterError, match="root is needed"):
            labelprep.export(_manifest(tmp_path / "out/manifest.csv"), tmp_path / "dest2")
