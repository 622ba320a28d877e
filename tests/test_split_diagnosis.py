"""Tests of labelprep.split_diagnosis and its views: a split that says why it misses its targets."""

from __future__ import annotations

import json
import shutil

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from labelprep.cli import main
from labelprep.errors import InputError, ParameterError
from labelprep.manifest import write
from labelprep.reports.split_findings import split_lines
from labelprep.split_diagnosis import _bridge_holds, diagnose_split
from labelprep.splits import split

CLASSES = ("ant", "bee", "cow", "dog")


def chain_manifest(groups=20, per_group=10, loose=20):
    """``groups`` user groups of ``per_group`` files (classes mixed), chained one to the next by
    a two-file near-duplicate cluster (cluster k: a file of group k and one of group k+1), plus
    ``loose`` files with no group and no copy. One bundle holds every grouped file."""
    rows = []
    for g in range(groups):
        for i in range(per_group):
            cluster = g if i == 0 and g < groups - 1 else g - 1 if i == 1 and g > 0 else pd.NA
            rows.append((f"g{g:02d}/f{i}.png", CLASSES[(g + i) % 4], f"g{g:02d}", cluster))
    rows += [(f"loose/f{i:02d}.png", CLASSES[i % 4], "", pd.NA) for i in range(loose)]
    path, label, group, cluster = zip(*rows)
    return pd.DataFrame({"path": path, "label": label, "group": group, "issues": "",
                         "dup_group": pd.array(cluster, dtype="Int64")})


def few_groups_manifest():
    """Many ungrouped files of three classes, and a class 'elk' whose 6 files form one group."""
    m = pd.DataFrame({"path": [f"x/{i:03d}.png" for i in range(90)],
                      "label": [CLASSES[i % 3] for i in range(90)], "group": "", "issues": "",
                      "dup_group": pd.array([pd.NA] * 90, dtype="Int64")})
    elk = pd.DataFrame({"path": [f"elk/{i}.png" for i in range(6)], "label": "elk",
                        "group": "herd", "issues": "", "dup_group": pd.array([pd.NA] * 6, dtype="Int64")})
    return pd.concat([m, elk], ignore_index=True)


class TestDiagnoseSplit:
    def test_chain_names_the_bundle_its_joins_and_the_bridges(self):
        """One chain of clusters and groups bundles most rows: the counts and the bridges are named."""
        found = diagnose_split(split(chain_manifest(), seed=0))
        assert not found["reached"]
        assert found["cause"] == "chaining"
        assert found["off_ratio"] == ["train", "val", "test"]
        top = found["bundles"][0]
        assert (top["rows"], top["groups"], top["parts"]) == (200, 20, 20)
        assert top["share"] == pytest.approx(200 / 220)
        assert top["splits"] == ["train"]
        # 19 clusters, each joining two groups: 38 cluster-group links, 38 bridging files
        assert (top["clusters"], top["joining_clusters"], top["links"], top["bridge_files"]) == (19, 19, 38, 38)
        assert (top["kind"], top["largest_part"]) == ("chain", 10)
        # the middle cluster (g09-g10) alone holds the two halves, 100 files each, together
        first_two = top["bridges"][:2]
        assert [b["path"] for b in first_two] == ["g09/f0.png", "g10/f1.png"]
        assert [b["holds"] for b in first_two] == [100, 100]
        assert all(b["joins"] == 2 for b in top["bridges"])
        # a link k clusters from the end holds 10 * k files (the short side of the chain)
        holds = sorted((b["holds"] for b in diagnose_split(split(chain_manifest(), seed=0))["bundles"][0]["bridges"]),
                       reverse=True)
        assert holds == [100, 100, 90, 90, 90, 90, 80, 80, 80, 80]
        # the loose files are bundles of one: too small to list after the chain
        assert len(found["bundles"]) == 1

    def test_listed_bridges_name_several_clusters(self):
        """A cluster spanning eight groups contributes at most three listed files; all are counted."""
        rows = [(f"g{g}/f{i}.png", CLASSES[i % 4], f"g{g}", 0 if i == 0 else 1 if i == 1 and g < 2 else pd.NA)
                for g in range(8) for i in range(5)]
        path, label, group, cluster = zip(*rows)
        m = pd.DataFrame({"path": path, "label": label, "group": group, "issues": "",
                          "dup_group": pd.array(cluster, dtype="Int64")})
        top = diagnose_split(split(m, seed=0))["bundles"][0]
        assert (top["bridge_files"], top["joining_clusters"]) == (10, 2)
        assert [b["cluster"] for b in top["bridges"]] == [0, 0, 0, 1, 1]
        # g2..g7 hang on cluster 0 alone (5 files each); g0 and g1 are also tied by cluster 1
        assert [b["holds"] for b in top["bridges"]] == [5, 5, 5, 0, 0]
        assert [b["joins"] for b in top["bridges"]] == [8, 8, 8, 2, 2]

    def test_chain_missing_classes_blame_chaining_not_groups(self):
        """Classes with many groups but too few bundles are put down to chaining."""
        found = diagnose_split(split(chain_manifest(groups=20, loose=0), seed=0))
        assert found["missing"], found
        assert {m["cause"] for m in found["missing"]} == {"chaining"}
        assert all(m["groups"] >= 3 and m["bundles"] < 3 for m in found["missing"])
        text = "\n".join(split_lines(found))
        assert "too few" not in text and "near-duplicate clusters join" in text

    def test_too_few_groups_gets_that_wording(self):
        """A class whose files lie in one user group, with no near-duplicate at all."""
        found = diagnose_split(split(few_groups_manifest(), seed=0))
        assert found["cause"] == "few-groups"
        assert found["off_ratio"] == []
        assert found["missing"] == [{"label": "elk", "splits": ["val", "test"], "files": 6, "groups": 1,
                                     "bundles": 1, "cause": "few-groups"}]
        lines = split_lines(found)
        assert len(lines) == 1
        assert "too few user groups" in lines[0] and "'elk': 6 files in 1 group" in lines[0]
        assert "near-duplicate" not in lines[0]

    def test_one_large_group_is_named_as_such(self):
        """A user group holding 95% of the rows, with no cluster, is a large group, not chaining."""
        m = pd.DataFrame({"path": [f"{i:03d}.png" for i in range(100)], "label": [CLASSES[i % 2] for i in range(100)],
                          "group": ["big"] * 95 + [""] * 5, "issues": ""})
        found = diagnose_split(split(m, seed=0))
        assert found["cause"] == "large-group"
        assert found["bundles"][0]["kind"] == "group"
        assert found["bundles"][0]["bridges"] == []

    def test_few_files_is_not_blamed_on_groups(self):
        m = few_groups_manifest()
        m = pd.concat([m, pd.DataFrame({"path": ["yak/0.png", "yak/1.png"], "label": "yak", "group": "",
                                         "issues": "", "dup_group": pd.array([pd.NA] * 2, dtype="Int64")})],
                      ignore_index=True)
        causes = {f["label"]: f["cause"] for f in diagnose_split(split(m, seed=0))["missing"]}
        assert causes == {"elk": "few-groups", "yak": "few-files"}

    def test_reached_split_has_no_findings(self):
        m = pd.DataFrame({"path": [f"{i:03d}.png" for i in range(200)], "label": [CLASSES[i % 4] for i in range(200)],
                          "issues": ""})
        found = diagnose_split(split(m, seed=0))
        assert found["reached"] and found["cause"] is None and found["bundles"] == []
        assert split_lines(found) == []

    def test_folds_measure_train_and_test(self):
        found = diagnose_split(split(chain_manifest(), folds=3, seed=0), folds=3)
        assert list(found["splits"]) == ["train", "test"]
        assert found["splits"]["train"]["target"] == pytest.approx(0.9)

    def test_diagnosis_is_json_and_independent_of_row_order(self):
        m = split(chain_manifest(), seed=0)
        found = diagnose_split(m)
        assert json.loads(json.dumps(found, allow_nan=False)) == found
        assert diagnose_split(m.sample(frac=1, random_state=3)) == found

    def test_bad_parameters(self):
        m = split(chain_manifest(), seed=0)
        with pytest.raises(ParameterError, match="tolerance=1.5"):
            diagnose_split(m, tolerance=1.5)
        with pytest.raises(TypeError, match="tolerance must be a number"):
            diagnose_split(m, tolerance="0.1")
        with pytest.raises(InputError, match="'split'"):
            diagnose_split(m.drop(columns="split"))


@settings(max_examples=60, deadline=None)
@given(st.integers(2, 12).flatmap(lambda n: st.tuples(
    st.just(n), st.lists(st.tuples(st.integers(0, n - 1), st.integers(0, n - 1)), max_size=20),
    st.lists(st.integers(0, 5), min_size=n, max_size=n))))
def test_bridge_holds_match_removing_each_edge(case):
    """Against scipy.sparse.csgraph.connected_components (the reference): removing a bridge splits
    its component in two, and it holds the lighter side; removing any other edge splits nothing."""
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    n, edges, weight = case
    edges = sorted({tuple(sorted(e)) for e in edges if e[0] != e[1]})
    a = np.array([e[0] for e in edges], dtype=np.int64)
    b = np.array([e[1] for e in edges], dtype=np.int64)
    holds = _bridge_holds(n, a, b, np.array(weight, dtype=float))

    def parts(keep):
        graph = coo_matrix((np.ones(keep.sum()), (a[keep], b[keep])), shape=(n, n))
        return connected_components(graph, directed=False)[1]

    whole = parts(np.ones(len(a), dtype=bool))
    for e in range(len(a)):
        keep = np.ones(len(a), dtype=bool)
        keep[e] = False
        label = parts(keep)
        side_a = label == label[a[e]]
        if label[a[e]] == label[b[e]]:
            assert holds[e] == 0
        else:
            side_b = label == label[b[e]]
            assert side_a.sum() + side_b.sum() == (whole == whole[a[e]]).sum()
            expected = min(np.asarray(weight)[side_a].sum(), np.asarray(weight)[side_b].sum())
            assert holds[e] == expected


class TestCommands:
    def test_split_says_why_and_fails_on_shortfall(self, runner, tmp_path):
        path = tmp_path / "m.csv"
        write(chain_manifest(), path)
        result = runner.invoke(main, ["split", str(path)])
        assert result.exit_code == 0, result.output
        assert "warning: the split misses its ratios" in result.stderr
        assert "near-duplicate clusters chain user groups" in result.stderr
        assert "bundle 0: 200 files (90.9% of the rows) in train" in result.stderr
        assert "20 user groups, joined by 19 near-duplicate clusters (38 cluster-group links)" in result.stderr
        assert "g09/f0.png  group g09, cluster 9 spans 2 groups or lone files, alone ties 100 files to the rest" in result.stderr
        assert "too few" not in result.output
        failed = runner.invoke(main, ["split", str(path), "--fail-on", "shortfall", "--quiet"])
        assert failed.exit_code == 1
        assert "--fail-on shortfall" in failed.output and "chaining" in failed.output

    def test_split_few_groups_wording(self, runner, tmp_path):
        path = tmp_path / "m.csv"
        write(few_groups_manifest(), path)
        result = runner.invoke(main, ["split", str(path), "--fail-on", "shortfall"])
        assert result.exit_code == 1
        assert "too few user groups to reach every split" in result.stderr
        assert "chain" not in result.stderr

    def test_split_that_reaches_its_targets_passes_the_gate(self, runner, tmp_path):
        path = tmp_path / "m.csv"
        write(pd.DataFrame({"path": [f"{i:03d}.png" for i in range(100)], "label": [CLASSES[i % 2] for i in range(100)],
                            "issues": ""}), path)
        result = runner.invoke(main, ["split", str(path), "--fail-on", "shortfall"])
        assert result.exit_code == 0, result.output
        assert "warning" not in result.output

    def test_report_json_and_html_carry_the_diagnosis(self, runner, tmp_path):
        path = tmp_path / "m.csv"
        write(chain_manifest(), path)
        assert runner.invoke(main, ["split", str(path), "--ratios", "0.6,0.2,0.2", "-q"]).exit_code == 0
        result = runner.invoke(main, ["report", str(path), "--json", str(tmp_path / "r.json"),
                                      "--html", str(tmp_path / "r.html"), "--markdown", str(tmp_path / "r.md")])
        assert result.exit_code == 0, result.output
        found = json.loads((tmp_path / "r.json").read_text())["split_diagnosis"]
        assert found["cause"] == "chaining"
        # the ratios come from the sidecar, as the split command recorded them
        assert found["splits"]["val"]["target"] == pytest.approx(0.2)
        assert found["bundles"][0]["bridges"][0]["path"] == "g09/f0.png"
        page = (tmp_path / "r.html").read_text()
        assert 'data-shortfall="chaining"' in page and 'data-bridge="g09/f0.png"' in page
        assert "28 more bridging files" in page
        assert "## Why the split misses its targets" in (tmp_path / "r.md").read_text()
        assert "warning: the split misses its ratios" in result.output

    def test_prepare_on_files_chained_by_copies(self, runner, tmp_path, write_image):
        """Real files: ten groups (by name), each linked to the next by a byte-identical copy."""
        root = tmp_path / "photos"
        seed = 0
        for g in range(10):
            for label in ("cat", "dog", "eel"):
                for k in range(2):
                    write_image(root / label / f"g{g}_{label}{k}.jpg", seed=seed)
                    seed += 1
        for g in range(9):  # g{g}'s first cat, copied into group g+1
            shutil.copyfile(root / "cat" / f"g{g}_cat0.jpg", root / "cat" / f"g{g + 1}_copy.jpg")
        out = tmp_path / "out"
        result = runner.invoke(main, ["prepare", str(root), "--out", str(out), "--group-pattern",
                                      r"(g\d+)_", "--fail-on", "shortfall", "-q", "-j", "1"])
        assert result.exit_code == 1
        assert "--fail-on shortfall" in result.output
        found = json.loads((out / "report.json").read_text())["split_diagnosis"]
        assert found["cause"] == "chaining"
        top = found["bundles"][0]
        assert (top["rows"], top["groups"], top["joining_clusters"], top["bridge_files"]) == (69, 10, 9, 18)
        assert top["bridges"][0]["holds"] >= 30
        assert 'data-shortfall="chaining"' in (out / "report.html").read_text()
        loud = runner.invoke(main, ["prepare", str(root), "--out", str(out), "--group-pattern",
                                    r"(g\d+)_", "--force", "-j", "1"])
        assert loud.exit_code == 0
        assert "near-duplicate clusters chain user groups" in loud.output
