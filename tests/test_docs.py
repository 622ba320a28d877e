"""The documents stay true: Quick start, CI command, manifest format description."""

from __future__ import annotations

import re
from pathlib import Path

from labelprep.codes import CODES
from labelprep.manifest import COLUMNS

ROOT = Path(__file__).resolve().parents[1]


def _quick_start_commands():
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    section = text.split("## Quick start", 1)[1].split("\n## ", 1)[0]
    return re.findall(r"```sh\n(.*?)\n```", section, flags=re.S)


def test_readme_opens_with_the_job_then_quick_start():
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    head = text.split("## ", 1)[0]
    paragraphs = [p for p in head.split("\n\n") if p.strip() and not p.startswith("#")]
    assert len(paragraphs) == 1
    assert text.split("\n## ", 2)[1].startswith("Quick start")


def test_quick_start_is_two_commands_install_demo_then_tests():
    commands = _quick_start_commands()
    assert len(commands) == 2
    assert "labelprep demo" in commands[0]
    assert "pytest" in commands[1]


def test_ci_runs_the_readme_test_command():
    ci = (ROOT / ".ci" / "run").read_text(encoding="utf-8")
    declared = re.search(r'^TEST_COMMAND="(.*)"$', ci, flags=re.M).group(1)
    assert declared == _quick_start_commands()[1]


def test_manifest_readme_describes_every_column_and_code():
    text = (ROOT / "manifests" / "README.md").read_text(encoding="utf-8")
    missing_cols = [c for c in COLUMNS if f"`{c}`" not in text]
    missing_codes = [c for c in CODES if f"`{c}`" not in text]
    assert not missing_cols, f"manifests/README.md lacks columns {missing_cols}"
    assert not missing_codes, f"manifests/README.md lacks issue codes {missing_codes}"


def test_demo_manifest_example_is_current(demo_tree, tmp_path):
    """manifests/demo-manifest.csv is exactly what the demo's prepare writes (seed 0).

    To refresh it after a deliberate change: `labelprep demo /tmp/d` and copy
    /tmp/d/out/manifest.csv over manifests/demo-manifest.csv.
    """
    from labelprep.demo import GROUP_PATTERN
    from labelprep.pipeline import prepare

    prepare(demo_tree, tmp_path / "out", group_pattern=GROUP_PATTERN, seed=0, jobs=1)
    produced = (tmp_path / "out" / "manifest.csv").read_text(encoding="utf-8")
    example = (ROOT / "manifests" / "demo-manifest.csv").read_text(encoding="utf-8")
    assert produced.splitlines() == example.splitlines()
