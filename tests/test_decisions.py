"""The decisions file: reading and its rules, applying each action, determinism, the stages and
commands that honour it, unknown paths reported."""

from __future__ import annotations

import csv
import hashlib
import json
import random

import pandas as pd
import pytest

from labelprep import decisions, manifest
from labelprep.cli import main
from labelprep.errors import InputError
from labelprep.pipeline import group_and_split, prepare
from test_reports import parse_page

HEADER = "path,action,value,note\n"


def write(path, rows: str):
    path.write_text(HEADER + rows, encoding="utf-8")
    return path


def table(rows: str):
    return decisions.parse((HEADER + rows).encode())


class TestRead:
    @pytest.mark.parametrize("rows, message", [
        ("a.jpg,erase,,\n", r"line 2: action 'erase' is not one of drop"),
        ("a.jpg,relabel,,\n", r"line 2: relabel needs a value \(the new label\)"),
        ("a.jpg,separate,,\n", r"line 2: separate needs a value \(the other file's path\)"),
        ("a.jpg,join,a.jpg,\n", r"line 2: join pairs 'a.jpg' with itself"),
        ("a.jpg,drop,yes,\n", r"line 2: drop takes no value"),
        (",drop,,\n", r"line 2: the path is empty"),
        ("a.jpg,keep,too-small,\n", r"line 2: keep mutes warnings; 'too-small' is an error"),
        ("a.jpg,keep,no-such-code,\n", r"line 2: keep names 'no-such-code', which is not an issue code"),
        ("a.jpg,relabel,cat,\nb.jpg,drop,,\na.jpg,relabel,dog,\n", r"line 4: 'a.jpg' is relabelled 'dog' here and 'cat' on line 2"),
        ("a.jpg,join,b.jpg,\nb.jpg,separate,a.jpg,\n", r"line 3: 'b.jpg' and 'a.jpg' are both separated and joined"),
        ("a.jpg,drop,,,extra\n", r"line 2: 5 fields, the header has 4"),
    ])
    def test_rules_name_the_line(self, rows, message):
        with pytest.raises(InputError, match=message):
            table(rows)

    def test_bad_header(self):
        with pytest.raises(InputError, match="the header must be path,action,value,note; got file,what"):
            decisions.parse(b"file,what\nx,drop\n")

    def test_spreadsheet_dialect(self, tmp_path):
        """A file saved by a spreadsheet: byte-order mark, CRLF line ends, quoted fields holding
        commas, quotes and a line break (RFC 4180 section 2), a blank line, columns value and note
        left out of the header."""
        f = tmp_path / "d.csv"
        with open(f, "w", newline="", encoding="utf-8-sig") as fh:
            w = csv.writer(fh, dialect="excel")  # the excel dialect writes CRLF, as RFC 4180 says
            w.writerows([["path", "action", "value", "note"],
                         ["cats, big/1.jpg", "relabel", 'lion "king"', "line one\nline two"], [],
                         ["b.jpg", "drop", "", ""]])
        d = decisions.load(f)
        assert d[["path", "action", "value", "note"]].values.tolist() == [
            ["cats, big/1.jpg", "relabel", 'lion "king"', "line one\nline two"], ["b.jpg", "drop", "", ""]]
        assert d["line"].tolist() == [3, 5]  # a quoted line break counts: the row ends on line 3
        assert decisions.parse(b"path,action\nb.jpg,drop\n")["value"].tolist() == [""]

    def test_digest_is_sha256_of_the_bytes(self, tmp_path):
        """The digest the sidecar records is SHA-256 (FIPS 180-4, as hashlib computes it) of the file."""
        f = write(tmp_path / "d.csv", "a.jpg,drop,,\n")
        assert decisions.load(f).attrs["sha256"] == hashlib.sha256(f.read_bytes()).hexdigest()

    def test_missing_file(self, tmp_path):
        assert decisions.load(tmp_path / "none.csv", required=False).empty
        with pytest.raises(InputError, match="does not exist"):
            decisions.load(tmp_path / "none.csv")


def small_manifest():
    return manifest.coerce(pd.DataFrame({
        "path": ["a.jpg", "b.jpg", "c.jpg", "d.jpg"], "label": ["cat", "cat", "dog", "dog"],
        "issues": ["has-location;near-blank", "", "too-small", ""],
        "sha256": ["1", "2", "3", "4"]}))


class TestApply:
    def test_each_row_action(self):
        d = table("a.jpg,keep,,clear sky\nb.jpg,relabel,dog,a dog\nc.jpg,keep,,\nd.jpg,drop,,blurred\n"
                  "b.jpg,keep,,\n")
        out = decisions.apply(small_manifest(), d).set_index("path")
        assert out.loc["a.jpg", "issues"] == "" and out.loc["a.jpg", "muted"] == "has-location;near-blank"
        assert (out.loc["b.jpg", "label"], out.loc["b.jpg", "label_original"]) == ("dog", "cat")
        assert out.loc["b.jpg", "decided"] == "relabel;keep"
        assert out.loc["b.jpg", "decision_note"] == "a dog"
        assert out.loc["c.jpg", "issues"] == "too-small"  # a keep never mutes an error
        assert out.loc["d.jpg", "issues"] == "dropped" and out.loc["d.jpg", "decided"] == "drop"

    def test_keep_one_code(self):
        out = decisions.apply(small_manifest(), table("a.jpg,keep,near-blank,\n"))
        assert out["issues"].iat[0] == "has-location" and out["muted"].iat[0] == "near-blank"

    def test_idempotent_and_undone(self):
        """Applying twice equals applying once; applying no decision restores the manifest."""
        m = small_manifest()
        d = table("a.jpg,keep,,\nb.jpg,relabel,dog,\nd.jpg,drop,,\n")
        once = decisions.apply(m, d)
        assert manifest.to_csv_bytes(decisions.apply(once, d)) == manifest.to_csv_bytes(once)
        back = decisions.apply(once, decisions.empty())
        assert manifest.to_csv_bytes(back) == manifest.to_csv_bytes(m)
        # a changed decision replaces the old one rather than stacking on it
        other = decisions.apply(once, table("b.jpg,relabel,eel,\n")).set_index("path")
        assert (other.loc["b.jpg", "label"], other.loc["b.jpg", "label_original"]) == ("eel", "cat")
        assert other.loc["a.jpg", "issues"] == "has-location;near-blank"

    def test_no_decision_no_columns(self):
        out = decisions.apply(small_manifest(), decisions.empty())
        assert not set(decisions.COLUMNS) & set(out.columns)

    def test_unknown_paths_are_found(self):
        d = table("a.jpg,drop,,\nghost.jpg,drop,,\na.jpg,join,ghost2.jpg,\n")
        found = decisions.findings(small_manifest(), d)
        assert found["unknown"] == [{"line": 3, "path": "ghost.jpg", "action": "drop", "value": ""},
                                    {"line": 4, "path": "a.jpg", "action": "join", "value": "ghost2.jpg"}]
        assert found["applied"]["drop"] == 1 and found["applied"]["join"] == 0
        assert decisions.apply(small_manifest(), d)["decided"].tolist() == ["drop", "", "", ""]


@pytest.fixture
def copies_tree(tmp_path, write_image):
    """cat/: a.jpg and its byte copy b.jpg, c.jpg; dog/: d.jpg, e.jpg, f.jpg; eel/: g, h (distinct)."""
    root = tmp_path / "photos"
    a = write_image(root / "cat" / "a.jpg", seed=1)
    (root / "cat" / "b.jpg").write_bytes(a.read_bytes())
    for name, seed in (("cat/c.jpg", 2), ("dog/d.jpg", 3), ("dog/e.jpg", 4), ("dog/f.jpg", 5),
                       ("eel/g.jpg", 6), ("eel/h.jpg", 7), ("cat/i.jpg", 8), ("dog/j.jpg", 9)):
        write_image(root / name, seed=seed)
    return root


def _grouped(tmp_path, root, rows: str):
    import labelprep

    m = labelprep.check(labelprep.scan(root, jobs=1))
    return group_and_split(m, table(rows), group_options={}, split_options={"seed": 0})


class TestPairs:
    def test_separate_exact_copies(self, tmp_path, copies_tree):
        plain = _grouped(tmp_path, copies_tree, "").set_index("path")
        assert plain.loc["cat/a.jpg", "dup_group"] == plain.loc["cat/b.jpg", "dup_group"]
        out = _grouped(tmp_path, copies_tree, "cat/b.jpg,separate,cat/a.jpg,not the same shot\n").set_index("path")
        assert out["dup_group"].isna().all()
        assert out.loc["cat/a.jpg", "decided"] == out.loc["cat/b.jpg", "decided"] == "separate"
        assert "exact-copy" in out.loc["cat/a.jpg", "issues"]  # still byte-identical: the fact stays

    def test_join_keeps_together(self, tmp_path, copies_tree):
        out = _grouped(tmp_path, copies_tree, "dog/d.jpg,join,eel/g.jpg,\ndog/d.jpg,join,cat/c.jpg,\n")
        out = out.set_index("path")
        joined = out.loc[["dog/d.jpg", "eel/g.jpg", "cat/c.jpg"]]
        assert joined["dup_group"].nunique() == 1 and joined["dup_group"].notna().all()
        # a joined cluster with two labels is a conflict, as found ones are
        assert joined["issues"].str.contains("label-conflict").all()

    def test_separate_still_joined_is_reported(self, tmp_path, copies_tree):
        """Three byte copies: separating two leaves both linked to the first, and that is said."""
        (copies_tree / "cat" / "b2.jpg").write_bytes((copies_tree / "cat" / "a.jpg").read_bytes())
        rows = "cat/b.jpg,separate,cat/b2.jpg,\n"
        out = _grouped(tmp_path, copies_tree, rows)
        assert decisions.findings(out, table(rows))["still_joined"] == [["cat/b.jpg", "cat/b2.jpg"]]


class TestStagesAndCommands:
    def test_prepare_same_bytes_whatever_the_row_order(self, tmp_path, copies_tree):
        rows = ["cat/a.jpg,separate,cat/b.jpg,", "dog/d.jpg,relabel,eel,", "dog/e.jpg,drop,,",
                "eel/g.jpg,join,eel/h.jpg,", "cat/c.jpg,keep,,", "ghost.jpg,drop,,"]
        outputs = []
        for k in range(3):
            random.Random(k).shuffle(rows)
            f = write(tmp_path / f"d{k}.csv", "\n".join(rows) + "\n")
            prepare(copies_tree, tmp_path / f"out{k}", jobs=1, seed=3, decisions=f)
            outputs.append((tmp_path / f"out{k}" / "manifest.csv").read_bytes())
        assert outputs[0] == outputs[1] == outputs[2]
        m = manifest.read(tmp_path / "out0" / "manifest.csv").set_index("path")
        assert m.loc["dog/e.jpg", "split"] == "" and "dropped" in m.loc["dog/e.jpg", "issues"]
        assert m.loc["dog/d.jpg", "label"] == "eel" and m.loc["dog/d.jpg", "label_original"] == "dog"
        assert m.loc["eel/g.jpg", "split"] == m.loc["eel/h.jpg", "split"] != ""
        side = manifest.read_sidecar(tmp_path / "out0" / "manifest.csv")
        digest = hashlib.sha256((tmp_path / "d0.csv").read_bytes()).hexdigest()
        assert side["stages"]["prepare"]["decisions"]["sha256"] == digest
        summary = json.loads((tmp_path / "out0" / "report.json").read_text())
        assert summary["decisions"]["unknown"][0]["path"] == "ghost.jpg"
        assert summary["decisions"]["applied"]["drop"] == 1
        page = parse_page((tmp_path / "out0" / "report.html").read_text())
        assert page.counts["decisions-unknown"] == 1 and page.counts["decided-drop"] == 1

    def test_prepare_reads_the_folders_file(self, tmp_path, copies_tree, runner):
        out = tmp_path / "out"
        out.mkdir()
        write(out / "decisions.csv", "dog/e.jpg,drop,,\nghost.jpg,relabel,x,\n")
        result = runner.invoke(main, ["prepare", str(copies_tree), "--out", str(out), "--jobs", "1", "-q"])
        assert result.exit_code == 0, result.output
        assert "decisions line 3: relabel names 'ghost.jpg', not in the manifest; not applied" in result.stderr
        assert manifest.read(out / "manifest.csv").set_index("path").loc["dog/e.jpg", "decided"] == "drop"

    def test_stage_commands_match_library(self, tmp_path, copies_tree, runner):
        """scan, check, group, split with the decisions file beside the manifest give what the
        library gives, and report applies it too."""
        import labelprep

        m_path = tmp_path / "work" / "m.csv"
        m_path.parent.mkdir()
        rows = "cat/a.jpg,separate,cat/b.jpg,\ndog/d.jpg,relabel,eel,\ndog/e.jpg,drop,,\ncat/c.jpg,keep,,\n"
        write(m_path.parent / "decisions.csv", rows)
        for args in (["scan", str(copies_tree), "-o", str(m_path), "--jobs", "1"], ["check", str(m_path)],
                     ["group", str(m_path)], ["split", str(m_path), "--seed", "3"]):
            result = runner.invoke(main, [*args, "-q"])
            assert result.exit_code == 0, result.output
        lib = group_and_split(labelprep.check(labelprep.scan(copies_tree, jobs=1)), table(rows),
                              group_options={}, split_options={"seed": 3})
        assert m_path.read_bytes() == manifest.to_csv_bytes(lib)
        side = manifest.read_sidecar(m_path)
        digest = hashlib.sha256((m_path.parent / "decisions.csv").read_bytes()).hexdigest()
        assert side["stages"]["group"]["options"]["decisions"]["sha256"] == digest
        assert side["stages"]["split"]["options"]["decisions"]["sha256"] == digest

        other = write(tmp_path / "other.csv", "cat/c.jpg,drop,,\nnowhere.jpg,keep,,\n")
        result = runner.invoke(main, ["report", str(m_path), "--json", str(tmp_path / "r.json"),
                                      "--decisions", str(other), "-q"])
        assert result.exit_code == 0, result.output
        assert "'nowhere.jpg', not in the manifest" in result.stderr
        summary = json.loads((tmp_path / "r.json").read_text())
        assert summary["decisions"]["applied"]["drop"] == 1
        assert any(i["code"] == "dropped" for i in summary["issues"])

    def test_split_warns_when_group_missed_pairs(self, tmp_path, copies_tree, runner):
        m_path = tmp_path / "m.csv"
        runner.invoke(main, ["scan", str(copies_tree), "-o", str(m_path), "--jobs", "1", "-q"])
        runner.invoke(main, ["group", str(m_path), "-q"])
        write(tmp_path / "decisions.csv", "cat/a.jpg,separate,cat/b.jpg,\n")
        result = runner.invoke(main, ["split", str(m_path), "-q"])
        assert result.exit_code == 0
        assert "run labelprep group first" in result.stderr

    def test_bad_file_is_exit_2(self, tmp_path, copies_tree, runner):
        f = write(tmp_path / "d.csv", "a.jpg,erase,,\n")
        result = runner.invoke(main, ["prepare", str(copies_tree), "--out", str(tmp_path / "o"),
                                      "--decisions", str(f), "--jobs", "1", "-q"])
        assert result.exit_code == 2 and "line 2: action 'erase'" in result.output


class TestPut:
    def test_replace_remove_and_previous(self):
        d = table("a.jpg,relabel,dog,\n")
        d2, previous = decisions.put(d, {"path": "a.jpg", "action": "relabel", "value": "eel"})
        assert previous == {"path": "a.jpg", "action": "relabel", "value": "dog", "note": ""}
        assert d2["value"].tolist() == ["eel"]
        d3, previous = decisions.put(d2, {"path": "b.jpg", "action": "separate", "value": "a.jpg"})
        assert previous is None and len(d3) == 2
        d4, previous = decisions.put(d3, {"path": "a.jpg", "action": "separate", "value": "b.jpg"}, remove=True)
        assert previous["action"] == "separate" and len(d4) == 1
        assert decisions.to_csv_bytes(d4) == b"path,action,value,note\na.jpg,relabel,eel,\n"


def test_audit_honours_separate(tmp_path, copies_tree, runner):
    """Byte copies the decisions separate may land in two splits; the audit then counts them as
    separated, not as a leak, and its gate passes."""
    import labelprep

    m = labelprep.check(labelprep.scan(copies_tree, jobs=1))
    m = m.assign(split=["train" if p == "cat/a.jpg" else "test" for p in m["path"]])
    rows = "cat/a.jpg,separate,cat/b.jpg,\n"
    assert [(p["path_a"], p["path_b"]) for p in labelprep.audit(m)["near_leaks"]] == [("cat/a.jpg", "cat/b.jpg")]
    result = labelprep.audit(m, decisions=table(rows))
    assert result["near_leaks"] == [] and result["separated"] == 1
    manifest.write(m, tmp_path / "m.csv")
    assert runner.invoke(main, ["audit", str(tmp_path / "m.csv"), "--fail-on", "leaks"]).exit_code == 1
    write(tmp_path / "decisions.csv", rows)
    out = runner.invoke(main, ["audit", str(tmp_path / "m.csv"), "--fail-on", "leaks"])
    assert out.exit_code == 0, out.output
    assert "not counted: 1 across splits that the decisions file separates" in out.output
