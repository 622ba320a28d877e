"""Each stage's options are declared once (labelprep.options.SPEC): the commands, prepare and the
sidecar all follow it, and an option added to it alone reaches them all. Also the exit status
of an exception labelprep did not expect."""

import inspect

import click
import pytest

from labelprep import checks, clusters, manifest, options, scanner, splits
from labelprep.cli import BUG_STATUS, DEBUG_VARIABLE, main
from labelprep.pipeline import prepare

STAGE_FUNCTIONS = {"scan": scanner.scan, "check": checks.check, "group": clusters.group,
                   "split": splits.split}


def _params(command) -> set:
    return {p.name for p in command.params}


@pytest.mark.parametrize("option", options.SPEC, ids=lambda o: o.name)
def test_spec_default_is_the_stage_functions_default(option):
    """The spec and each stage function it feeds agree on the default, so a library call and a
    command with no options do the same thing."""
    for stage in option.stages:
        parameter = inspect.signature(STAGE_FUNCTIONS[stage]).parameters[option.name]
        assert parameter.default == option.default, (stage, option.name)


@pytest.mark.parametrize("stage", options.STAGES)
def test_each_command_has_its_stages_options(stage):
    command = main.commands[stage]
    names = {o.name for o in options.of(stage)}
    assert names <= _params(command)
    assert names <= _params(main.commands["prepare"])


def test_prepare_command_has_every_spec_option_once():
    flags = [opt for p in main.commands["prepare"].params for opt in p.opts]
    assert len(flags) == len(set(flags))
    assert {o.name for o in options.SPEC} <= _params(main.commands["prepare"])


def test_unknown_option_is_a_type_error_naming_it(class_tree, tmp_path):
    with pytest.raises(TypeError, match="'min_sides'"):
        prepare(class_tree, tmp_path / "out", min_sides=3)
    assert not (tmp_path / "out").exists()  # refused before any work


class TestAddingAnOption:
    """DEVELOPERS.md "How to add a check": a new limit is a keyword of check() and one Option in
    SPEC; prepare, the command's click options and the sidecar must follow with no other edit."""

    @pytest.fixture
    def added(self, monkeypatch):
        seen = []
        real = checks.check

        def check_with_limit(m, *, min_sharpness=5, **limits):
            seen.append(min_sharpness)
            return real(m, **limits)

        new = options.Option("min_sharpness", ("check",), 5, dict(
            type=click.IntRange(min=0), help="An option added by this test."))
        monkeypatch.setattr(options, "SPEC", options.SPEC + (new,))
        monkeypatch.setattr(options, "BY_NAME", {**options.BY_NAME, new.name: new})
        monkeypatch.setattr(checks, "check", check_with_limit)
        return seen

    def test_prepare_passes_it_and_records_it(self, added, class_tree, tmp_path):
        prepare(class_tree, tmp_path / "out", jobs=1, min_sharpness=9)
        assert added == [9]
        recorded = manifest.read_sidecar(tmp_path / "out" / "manifest.csv")["stages"]["prepare"]["options"]
        assert recorded["min_sharpness"] == 9

    def test_prepare_fills_in_its_default(self, added, class_tree, tmp_path):
        prepare(class_tree, tmp_path / "out", jobs=1)
        assert added == [5]

    def test_click_options_parse_it(self, added, runner):
        got = {}

        @click.command()
        @options.click_options("check")
        def probe_command(**chosen):
            got.update(chosen)

        result = runner.invoke(probe_command, ["--min-sharpness", "3", "--min-side", "40"])
        assert result.exit_code == 0, result.output
        assert got["min_sharpness"] == 3 and got["min_side"] == 40
        assert options.record(got, "check")["min_sharpness"] == 3


def test_every_option_reaches_its_stage_and_the_sidecar(class_tree, tmp_path, monkeypatch):
    """prepare hands each stage exactly the spec options of that stage, and records the rest."""
    received = {}
    modules = {"scan": scanner, "check": checks, "group": clusters, "split": splits}
    for stage, function in STAGE_FUNCTIONS.items():
        def spy(*args, _stage=stage, _real=function, **kwargs):
            received[_stage] = kwargs
            return _real(*args, **kwargs)
        monkeypatch.setattr(modules[stage], function.__name__, spy)
    chosen = {"layout": "folders", "group_pattern": r"/(g\d)_", "include_hidden": True, "jobs": 1,
              "max_pixels": 10_000_000, "min_side": 8, "max_aspect": 4.0, "min_spread": 1.5,
              "max_distance": 6, "keep_conflicts": True, "flips": True, "ratios": (0.5, 0.25, 0.25),
              "seed": 3, "folds": None}
    prepare(class_tree, tmp_path / "out", **chosen)
    for stage in options.STAGES:
        for option in options.of(stage):
            if option.name in chosen:
                assert received[stage][option.name] == chosen[option.name], (stage, option.name)
    recorded = manifest.read_sidecar(tmp_path / "out" / "manifest.csv")["stages"]["prepare"]["options"]
    expected = {o.name for o in options.SPEC if o.recorded and not o.record_if_set}
    assert set(recorded) == expected
    assert recorded["ratios"] == [0.5, 0.25, 0.25] and recorded["keep_from"] is None
    assert recorded["seed"] == 3 and recorded["min_side"] == 8 and "jobs" not in recorded


class TestUnexpectedException:
    @pytest.fixture
    def broken_check(self, monkeypatch):
        def broken(m, **limits):
            raise KeyError("a column nobody expected")

        monkeypatch.setattr(checks, "check", broken)

    @pytest.fixture
    def scanned(self, runner, class_tree, tmp_path):
        out = tmp_path / "m.csv"
        assert runner.invoke(main, ["scan", str(class_tree), "-o", str(out), "-j", "1", "-q"]).exit_code == 0
        return out

    def test_own_status_and_one_line(self, runner, scanned, broken_check, monkeypatch):
        monkeypatch.delenv(DEBUG_VARIABLE, raising=False)
        result = runner.invoke(main, ["check", str(scanned)])
        assert result.exit_code == BUG_STATUS == 70
        assert not isinstance(result.exception, KeyError)  # handled, not escaping as a traceback
        lines = result.output.strip().splitlines()
        assert len(lines) == 1
        assert "report it as a labelprep bug" in lines[0] and "KeyError" in lines[0]

    def test_debug_variable_shows_the_traceback(self, runner, scanned, broken_check, monkeypatch):
        monkeypatch.setenv(DEBUG_VARIABLE, "1")
        result = runner.invoke(main, ["check", str(scanned)])
        assert isinstance(result.exception, KeyError)
        assert result.exit_code == 1  # the interpreter's status for an uncaught exception

    def test_library_errors_keep_their_status(self, runner, tmp_path):
        bad = tmp_path / "x.csv"
        bad.write_text("a,b\n1,2\n")
        result = runner.invoke(main, ["check", str(bad)])
        assert result.exit_code == 2 and "no 'path' column" in result.output
