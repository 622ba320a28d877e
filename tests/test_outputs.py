"""The one output guard (labelprep.manifest.guard_output): no command and no library function
writes over a file labelprep did not write unless forced; its own outputs it may replace."""

import json

import pandas as pd
import pytest

from labelprep import manifest
from labelprep.cli import main
from labelprep.demo import PLANTED_NAME, make_demo
from labelprep.errors import OutputExistsError
from labelprep.reports import report

FOREIGN = b"my own notes\nplease keep\n"


def _run(runner, *args):
    result = runner.invoke(main, [str(a) for a in args])
    # an uncaught exception goes to result.exception, not the output
    assert result.exception is None or isinstance(result.exception, SystemExit), result.exception
    return result


def _foreign(path):
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_bytes(FOREIGN)
    return path


@pytest.fixture
def prepared(runner, class_tree, tmp_path):
    out = tmp_path / "out"
    assert _run(runner, "prepare", class_tree, "--out", out, "-j", "1", "-q").exit_code == 0
    return out


class TestLibrary:
    def test_write_text_honours_force(self, tmp_path):
        target = _foreign(tmp_path / "notes.txt")
        with pytest.raises(OutputExistsError, match="pass --force"):
            manifest.write_text(target, "{}\n")
        assert target.read_bytes() == FOREIGN
        manifest.write_text(target, "{}\n", force=True)
        assert target.read_text() == "{}\n"

    def test_own_output_is_replaced_until_someone_edits_it(self, tmp_path):
        target = manifest.write_text(tmp_path / "a.json", "1\n")
        manifest.write_text(target, "2\n")  # labelprep's own, unchanged since: no force needed
        assert target.read_text() == "2\n"
        target.write_text("2 and my remark\n")  # now the user's
        with pytest.raises(OutputExistsError):
            manifest.write_text(target, "3\n")
        assert target.read_text() == "2 and my remark\n"

    def test_a_table_that_only_looks_like_a_manifest_is_not_replaced(self, tmp_path):
        """A label table starts with path, as a manifest does; without a sidecar it is the user's."""
        table = tmp_path / "labels.csv"
        table.write_text("path,label\na.jpg,cat\n")
        with pytest.raises(OutputExistsError):
            manifest.write(pd.DataFrame({"path": ["b.jpg"], "label": ["dog"]}), table)
        assert table.read_text() == "path,label\na.jpg,cat\n"

    def test_report_refuses_each_foreign_target_before_writing_any(self, tmp_path):
        m = pd.DataFrame({"path": ["a.png"], "label": ["cat"]})
        page = _foreign(tmp_path / "page.html")
        with pytest.raises(OutputExistsError):
            report(m, json=tmp_path / "r.json", html=page)
        assert not (tmp_path / "r.json").exists() and page.read_bytes() == FOREIGN

    def test_demo_refuses_a_foreign_planted_list(self, tmp_path):
        planted = _foreign(tmp_path / "demo" / PLANTED_NAME)
        with pytest.raises(OutputExistsError):
            make_demo(tmp_path / "demo")
        assert planted.read_bytes() == FOREIGN and not (tmp_path / "demo" / "photos").exists()


class TestCommands:
    def test_scan(self, runner, class_tree, tmp_path):
        target = _foreign(tmp_path / "labels.csv")
        assert _run(runner, "scan", class_tree, "-o", target, "-j", "1", "-q").exit_code == 2
        assert target.read_bytes() == FOREIGN
        assert _run(runner, "scan", class_tree, "-o", target, "-j", "1", "-q", "--force").exit_code == 0
        assert _run(runner, "scan", class_tree, "-o", target, "-j", "1", "-q").exit_code == 0  # now its own

    @pytest.mark.parametrize("command", ["check", "group", "split"])
    def test_stages_rewriting_a_table_without_sidecar(self, runner, prepared, tmp_path, command):
        """check, group and split write MANIFEST back: a table labelprep did not write needs --force."""
        table = tmp_path / "mine.csv"
        table.write_bytes((prepared / "manifest.csv").read_bytes())  # copied without its sidecar
        before = table.read_bytes()
        result = _run(runner, command, table, "-q")
        assert result.exit_code == 2 and "--force" in result.output
        assert table.read_bytes() == before
        assert _run(runner, command, table, "-q", "--force").exit_code == 0
        assert _run(runner, command, table, "-q").exit_code == 0  # it has a sidecar now

    def test_report(self, runner, prepared, tmp_path):
        target = _foreign(tmp_path / "summary.json")
        assert _run(runner, "report", prepared / "manifest.csv", "--json", target, "-q").exit_code == 2
        assert target.read_bytes() == FOREIGN
        assert _run(runner, "report", prepared / "manifest.csv", "--json", target, "-q", "--force").exit_code == 0
        assert json.loads(target.read_text())["files"] == 12

    def test_audit_json_over_a_text_file(self, runner, prepared, tmp_path):
        """The issue's reproduction: audit MANIFEST --json notes.txt replaced the user's notes."""
        notes = _foreign(tmp_path / "notes.txt")
        result = _run(runner, "audit", prepared / "manifest.csv", "--json", notes, "-q")
        assert result.exit_code == 2 and "--force" in result.output
        assert notes.read_bytes() == FOREIGN
        assert _run(runner, "audit", prepared / "manifest.csv", "--json", notes, "-q", "--force").exit_code == 0
        assert "near_leaks" in json.loads(notes.read_text())
        assert _run(runner, "audit", prepared / "manifest.csv", "--json", notes, "-q").exit_code == 0

    def test_export_lists(self, runner, prepared, tmp_path):
        dest = tmp_path / "dest"
        lists = _foreign(dest / "train.csv")
        result = _run(runner, "export", prepared / "manifest.csv", dest, "-q")
        assert result.exit_code == 2 and lists.read_bytes() == FOREIGN
        assert _run(runner, "export", prepared / "manifest.csv", dest, "-q", "--force").exit_code == 0
        assert lists.read_text().startswith("path,label,source\n")

    def test_prepare(self, runner, class_tree, tmp_path):
        out = tmp_path / "out"
        page = _foreign(out / "report.json")
        assert _run(runner, "prepare", class_tree, "--out", out, "-j", "1", "-q").exit_code == 2
        assert page.read_bytes() == FOREIGN and not (out / "manifest.csv").exists()
        assert _run(runner, "prepare", class_tree, "--out", out, "-j", "1", "-q", "--force").exit_code == 0
        # a second run replaces its own manifest and reports without --force
        assert _run(runner, "prepare", class_tree, "--out", out, "-j", "1", "-q").exit_code == 0

    def test_demo(self, runner, tmp_path):
        planted = _foreign(tmp_path / "demo" / PLANTED_NAME)
        result = _run(runner, "demo", tmp_path / "demo", "-q")
        assert result.exit_code == 2 and "--force" in result.output
        assert planted.read_bytes() == FOREIGN


def test_split_seed_reaches_the_report(runner, prepared):
    """split --seed 5 after prepare: the sidecar and report.json say seed 5 (was: 0, the stale
    top-level seed prepare had written)."""
    target = prepared / "manifest.csv"
    assert _run(runner, "split", target, "--seed", "5", "-q").exit_code == 0
    assert manifest.read_sidecar(target)["seed"] == 5
    assert _run(runner, "report", target, "--json", prepared / "report.json", "-q").exit_code == 0
    assert json.loads((prepared / "report.json").read_text())["seed"] == 5
    # the seed is that of the latest split, whichever command made it
    assert _run(runner, "split", target, "--seed", "2", "-q").exit_code == 0
    assert _run(runner, "report", target, "--json", prepared / "report.json", "-q").exit_code == 0
    assert json.loads((prepared / "report.json").read_text())["seed"] == 2
