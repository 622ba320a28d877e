"""The command line end to end: scan, prepare, demo, exit codes, fast start-up."""

from __future__ import annotations

import subprocess
import sys

import pandas as pd
import pytest

import labelprep
from labelprep import manifest
from labelprep.cli import main
from conftest import assert_handled


def test_help_imports_nothing_heavy():
    """`labelprep --help` must not import pandas, numpy or Pillow (start-up stays fast)."""
    code = ("import sys; from click.testing import CliRunner; from labelprep.cli import main; "
            "r = CliRunner().invoke(main, ['--help']); assert r.exit_code == 0, r.output; "
            "print(sorted(m for m in ('pandas', 'numpy', 'PIL') if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]"


def test_scan_does_not_import_scipy(tmp_path):
    """Importing scipy.fft costs about half a second per process: scanning needs numpy and
    Pillow only (the DCT is numpy's), so scans and their workers start fast."""
    from PIL import Image

    (tmp_path / "a").mkdir()
    Image.new("RGB", (300, 200), (10, 90, 200)).save(tmp_path / "a" / "x.jpg")
    code = ("import sys; from labelprep.cli import main; "
            f"main(['scan', {str(tmp_path)!r}, '-o', {str(tmp_path / 'm.csv')!r}, '--jobs', '1', '-q'], "
            "standalone_mode=False); print(sorted({m.split('.')[0] for m in sys.modules} & {'scipy', 'imagehash'}))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip().splitlines()[-1] == "[]"


def test_python_dash_m_works():
    out = subprocess.run([sys.executable, "-m", "labelprep", "--version"], capture_output=True, text=True)
    assert out.returncode == 0
    assert labelprep.__version__ in out.stdout


def test_public_api_matches_all():
    """Each name in __all__ is the object its module defines under that name (a wrong entry in
    the lazy table would give another function, or raise), and no other public name is offered."""
    import importlib

    from labelprep import errors

    for name in set(labelprep.__all__) - {"__version__"}:
        value = getattr(labelprep, name)
        module = importlib.import_module(value.__module__)
        assert getattr(module, value.__name__) is value
        assert value.__name__ == name or name in ("read_manifest", "write_manifest")
    assert labelprep.read_manifest is manifest.read and labelprep.write_manifest is manifest.write
    assert issubclass(labelprep.GateFailed, errors.LabelprepError)
    assert sorted(dir(labelprep)) == sorted(labelprep.__all__)
    with pytest.raises(AttributeError, match="no attribute 'nope'"):
        labelprep.nope


class TestScanCommand:
    def test_scan_writes_manifest_and_sidecar(self, runner, class_tree, tmp_path):
        out = tmp_path / "m.csv"
        result = runner.invoke(main, ["scan", str(class_tree), "-o", str(out), "--jobs", "1"])
        assert result.exit_code == 0, result.output
        m = manifest.read(out)
        assert len(m) == 12
        assert sorted(m["label"].unique()) == ["cat", "dog", "eel"]
        assert m["path"].tolist() == sorted(m["path"])
        side = manifest.read_sidecar(out)
        assert side["root"] == str(class_tree.resolve())
        assert side["stages"]["scan"]["options"]["layout"] == "auto"
        assert "12 files indexed" in result.output

    def test_scan_matches_library(self, runner, class_tree, tmp_path):
        """The command writes exactly what the library function returns."""
        out = tmp_path / "m.csv"
        runner.invoke(main, ["scan", str(class_tree), "-o", str(out), "--jobs", "1"], catch_exceptions=False)
        lib = labelprep.scan(class_tree, jobs=1)
        assert out.read_bytes() == manifest.to_csv_bytes(lib)

    def test_same_tree_same_bytes_across_jobs(self, runner, class_tree, tmp_path):
        a, b = tmp_path / "a.csv", tmp_path / "b.csv"
        runner.invoke(main, ["scan", str(class_tree), "-o", str(a), "--jobs", "1"], catch_exceptions=False)
        runner.invoke(main, ["scan", str(class_tree), "-o", str(b), "--jobs", "2"], catch_exceptions=False)
        assert a.read_bytes() == b.read_bytes()

    def test_group_pattern_and_hidden_files(self, runner, class_tree, tmp_path):
        (class_tree / ".hidden.jpg").write_bytes(b"x")
        out = tmp_path / "m.csv"
        result = runner.invoke(main, ["scan", str(class_tree), "-o", str(out), "--jobs", "1",
                                      "--group-pattern", r"/(g\d)_"])
        assert result.exit_code == 0
        assert "skipped 1 hidden or system files" in result.output
        m = manifest.read(out)
        assert set(m["group"]) == {"g0", "g1"}

    def test_foreign_output_needs_force(self, runner, class_tree, tmp_path):
        out = tmp_path / "precious.csv"
        out.write_text("do,not\nlose,me\n")
        result = runner.invoke(main, ["scan", str(class_tree), "-o", str(out)])
        assert result.exit_code == 2
        assert "pass --force" in result.output
        assert out.read_text() == "do,not\nlose,me\n"

    def test_missing_root_is_usage_error(self, runner, tmp_path):
        result = runner.invoke(main, ["scan", str(tmp_path / "nope"), "-o", str(tmp_path / "m.csv")])
        assert result.exit_code == 2

    def test_bad_label_table_is_one_line_error(self, runner, class_tree, tmp_path):
        table = tmp_path / "labels.csv"
        table.write_text("path,label\n../../etc/passwd,cat\n")
        result = runner.invoke(main, ["scan", str(class_tree), "-o", str(tmp_path / "m.csv"),
                                      "--labels", str(table)])
        assert result.exit_code == 2
        assert "line 2" in result.output and "escapes the root" in result.output
        assert not (tmp_path / "m.csv").exists()


class TestDemoCommand:
    def test_demo_generates_runs_and_lists_each_issue_once(self, runner, tmp_path):
        """The Quick start's command: the photos, the three outputs, the tables, and every issue
        code of the manifest listed once, with its count (no second table repeating the counts)."""
        from labelprep import codes

        folder = tmp_path / "demo"
        result = runner.invoke(main, ["demo", str(folder), "--jobs", "1"], catch_exceptions=False)
        assert result.exit_code == 0, result.output
        for name in ("manifest.csv", "report.json", "report.html"):
            assert (folder / "out" / name).is_file()
        m = manifest.read(folder / "out" / "manifest.csv")
        tally = codes.counts(m["issues"])
        assert tally  # the demo plants problems
        lines = result.output.splitlines()
        for code, n in tally.items():
            headers = [line for line in lines if line.split()[:1] == [code]]
            assert len(headers) == 1, (code, headers)
            assert headers[0].split()[2] == str(n)
        assert "22 planted problems" in result.output and "train" in result.output

    def test_demo_does_not_replace_photos_it_did_not_make(self, runner, tmp_path):
        photos = tmp_path / "photos"
        photos.mkdir()
        (photos / "mine.jpg").write_bytes(b"a user's file")
        result = runner.invoke(main, ["demo", str(tmp_path), "-q"])
        assert_handled(result, 2)
        assert "--force" in result.output
        assert (photos / "mine.jpg").read_bytes() == b"a user's file"


@pytest.mark.parametrize("stage", ["check", "group", "split", "report", "audit", "by_split"])
def test_every_stage_refuses_a_non_manifest_with_its_own_errors(stage):
    """A list where a manifest goes is a TypeError naming the parameter; a manifest without the
    columns a stage reads is an InputError naming them, the same in every stage (never an
    AttributeError from pandas, never a ParameterError in one stage and an InputError in another)."""
    from labelprep.balance import by_split
    from labelprep.errors import InputError

    func = {"check": labelprep.check, "group": labelprep.group, "split": labelprep.split,
            "report": labelprep.report, "audit": labelprep.audit, "by_split": by_split}[stage]
    with pytest.raises(TypeError, match="manifest must be a pandas DataFrame, got list"):
        func([{"path": "a.png"}])
    with pytest.raises(InputError, match="has no column"):
        func(pd.DataFrame({"other": ["a.png"]}))


class TestGatesAndSplitCommand:
    def test_prepare_fail_on_sets_the_exit_status(self, runner, class_tree, tmp_path):
        """A truncated file is an error: --fail-on error exits 1 (a failed gate, after writing
        everything), --fail-on warning too, --fail-on never 0; the outputs are the same."""
        (class_tree / "cat" / "cut.jpg").write_bytes((class_tree / "cat" / "g0_cat_0.jpg").read_bytes()[:600])
        outputs = {}
        for level, status in (("never", 0), ("error", 1), ("warning", 1)):
            out = tmp_path / level
            result = runner.invoke(main, ["prepare", str(class_tree), "--out", str(out), "--jobs", "1",
                                          "--fail-on", level, "-q"])
            assert_handled(result, status)
            if status:
                assert "--fail-on " + level in result.output and "truncated" in result.output
            outputs[level] = (out / "manifest.csv").read_bytes()
        assert len(set(outputs.values())) == 1

    def test_split_command_writes_the_split_and_prints_its_sizes(self, runner, class_tree, tmp_path):
        out = tmp_path / "m.csv"
        assert runner.invoke(main, ["scan", str(class_tree), "-o", str(out), "--jobs", "1", "-q"]).exit_code == 0
        result = runner.invoke(main, ["split", str(out), "--ratios", "0.5,0.25,0.25", "--seed", "3"])
        assert_handled(result, 0)
        m = manifest.read(out)
        library = labelprep.split(manifest.read(out), ratios=(0.5, 0.25, 0.25), seed=3)
        assert m["split"].tolist() == library["split"].tolist()
        counts = m["split"].value_counts()
        assert f"train: {counts['train']}" in result.output and f"test: {counts['test']}" in result.output
        assert manifest.read_sidecar(out)["stages"]["split"]["options"]["seed"] == 3
        bad = runner.invoke(main, ["split", str(out), "--ratios", "0.5,0.6"])
        assert_handled(bad, 2)
        assert "ratios" in bad.output
