"""The ``labelprep`` command line: each command parses, calls one library function, prints.

Nothing heavy is imported at module level, so ``labelprep --help`` answers at once. Library errors
(:class:`labelprep.errors.LabelprepError`) become one line on stderr and their exit code: 2 for bad
usage or unreadable input, 1 for a failed ``--fail-on`` gate. Any other exception is a labelprep
bug: one line asking for a bug report and exit status 70 (``BUG_STATUS``, sysexits.h
EX_SOFTWARE); set ``LABELPREP_DEBUG=1`` to get the traceback instead. Each stage's options come
from :data:`labelprep.options.SPEC`.
"""

from __future__ import annotations

import os
from pathlib import Path

import click

from . import __version__, defaults, options
from .errors import LabelprepError


class _Failure(click.ClickException):
    def __init__(self, message: str, exit_code: int):
        super().__init__(message)
        self.exit_code = exit_code


class _Stopped(BaseException):
    """A signal ended the command (raised where it arrived, so every finally block runs)."""

    def __init__(self, signum: int):
        super().__init__(signum)
        self.signum = signum


# sysexits.h EX_SOFTWARE, "an internal software error has been detected": neither a failed gate
# (1) nor bad usage or input (2)
BUG_STATUS = 70
DEBUG_VARIABLE = "LABELPREP_DEBUG"


def _bug_line(exc: Exception) -> str:
    """One line for an exception labelprep did not expect: what it was, and where to send it."""
    what = " ".join(str(exc).split())[:200]
    return (f"internal error, please report it as a labelprep bug with the command you ran "
            f"({type(exc).__name__}: {what}); {DEBUG_VARIABLE}=1 shows the traceback")


def _stop(signum, frame):
    raise _Stopped(signum)


# what an interrupted command says; outputs are atomic and a scan keeps its journal
_RESUME = ("stopped by {what}: nothing half-written was left; run the same command again to "
           "resume (files already decoded are not decoded again)")


class _Group(click.Group):
    def invoke(self, ctx):
        import signal
        import threading

        # SIGTERM ends a command the way Ctrl-C does, through its finally blocks: worker
        # processes are stopped, the scan journal is flushed, temporary files are removed
        main_thread = threading.current_thread() is threading.main_thread()
        previous = signal.signal(signal.SIGTERM, _stop) if main_thread else None
        try:
            return super().invoke(ctx)
        except LabelprepError as exc:
            raise _Failure(_flag_words(str(exc), ctx), exc.exit_code) from exc
        except (KeyboardInterrupt, _Stopped) as exc:
            # the shell's status for death by a signal is 128 + its number (130 Ctrl-C, 143 kill)
            signum = getattr(exc, "signum", signal.SIGINT)
            click.echo(_RESUME.format(what="Ctrl-C" if signum == signal.SIGINT else "SIGTERM"), err=True)
            raise SystemExit(128 + signum) from None
        except (click.ClickException, click.exceptions.Exit, click.Abort):
            raise
        except Exception as exc:
            if os.environ.get(DEBUG_VARIABLE):
                raise
            raise _Failure(_bug_line(exc), BUG_STATUS) from exc
        finally:
            if main_thread:
                signal.signal(signal.SIGTERM, previous)


def _flag_words(message: str, ctx) -> str:
    """``message`` with the library's parameter names written as the options the user typed:
    ``seed must be 0 or more, got seed=-5`` -> ``--seed must be 0 or more, got --seed -5``."""
    import re

    sub = ctx.invoked_subcommand and ctx.command.get_command(ctx, ctx.invoked_subcommand)
    flags = {param.name: max(param.opts, key=len) for param in getattr(sub, "params", [])
             if isinstance(param, click.Option)}
    if not flags:
        return message

    def assigned(match):  # name=value anywhere
        name, value = match.group(1), match.group(2).strip("'\"")
        return f"{flags[name]} {value}" if name in flags else match.group(0)

    def leading(match):  # a name opening the message or a clause: "seed must be ..."
        name = match.group(2)
        return match.group(1) + flags[name] if name in flags else match.group(0)

    message = re.sub(r"(?<![\w\-./'])([a-z][a-z_]*)=('[^']*'|\"[^\"]*\"|[^\s,;)]+)", assigned, message)
    return re.sub(r"(^|; )([a-z][a-z_]*)(?= )", leading, message)


_existing_dir = click.Path(exists=True, file_okay=False, dir_okay=True, path_type=Path)
# a root is a folder or an archive (.zip, .tar, .tar.gz, .tgz); sources.name_roots judges which
_existing_root = click.Path(exists=True, file_okay=True, dir_okay=True, path_type=Path)
# a manifest is a file, or a folder of part files (partitioned Parquet); read() tells them apart
_existing_manifest = click.Path(exists=True, file_okay=True, dir_okay=True, path_type=Path)

_quiet = click.option("--quiet", "-q", is_flag=True, help="No progress bar and no summary.")
_force = click.option("--force", is_flag=True,
                      help="Replace outputs that labelprep did not write (never touches sources).")
_jobs = options.BY_NAME["jobs"].decorator()
# each stage's options come from labelprep.options.SPEC; prepare takes those of every stage
SCAN_OPTIONS = options.click_options("scan")
CHECK_OPTIONS = options.click_options("check")
GROUP_OPTIONS = options.click_options("group")
SPLIT_OPTIONS = options.click_options("split")
VET_OPTIONS = options.click_options("features", "vet")
_fail_on = click.option("--fail-on", type=click.Choice(["error", "warning", "never"]), default="never",
                        show_default=True,
                        help="Exit with status 1 when any file has an issue of this severity or worse.")
# the split's own gate: its ratios or class coverage missed (labelprep.split_diagnosis says why)
SHORTFALL = "shortfall"
_SHORTFALL_HELP = (f"'shortfall' exits with status 1 when the split misses a ratio by more than "
                   f"{defaults.SPLIT_TOLERANCE:.0%} of the files or leaves a class out of a split; "
                   "the warning names the cause.")
_EMPTY_HELP = "'empty' exits with status 1 when a split or a class ends up with no file. "
_fail_on_split = click.option("--fail-on", type=click.Choice([SHORTFALL, "empty", "never"]), default="never",
                              show_default=True,
                              help=_SHORTFALL_HELP + " " + _EMPTY_HELP + "'shortfall' includes it.")
_fail_on_prepare = click.option(
    "--fail-on", type=click.Choice(["empty", "error", "warning", SHORTFALL, "never"]), default="never",
    show_default=True, help=_EMPTY_HELP + "'error' and 'warning' also exit 1 when any file has an "
                            "issue of this severity or worse. " + _SHORTFALL_HELP)


_decisions = click.option(
    "--decisions", "decisions", type=click.Path(exists=True, dir_okay=False, path_type=Path),
    default=None, metavar="FILE",
    help="Decisions file (CSV path,action,value,note: drop, relabel, separate, join, keep), as "
         "written by `labelprep review`. Default: decisions.csv beside the manifest (in --out "
         "for prepare), when it exists.")


def _load_decisions(given, folder):
    from .pipeline import load_decisions

    return load_decisions(folder, given)


def _tell_decisions(found: dict):
    """Decisions that did not take effect, on stderr (never silent, also with --quiet)."""
    for u in found["unknown"]:
        if u["action"] in ("separate", "join"):
            named = f"{u['path']!r} and {u['value']!r}, one of them not in the manifest"
        else:
            named = f"{u['path']!r}, not in the manifest"
        click.echo(f"warning: decisions line {u['line']}: {u['action']} names {named}; not applied",
                   err=True)
    for a, b in found["still_joined"]:
        click.echo(f"warning: {a!r} and {b!r} are separated but other links keep them in one "
                   "cluster; separate them from those files too", err=True)


def _progress(quiet: bool):
    from .progress import terminal

    return terminal(quiet=quiet)


def _say(quiet: bool, text: str = "", **kwargs):
    if not quiet:
        click.echo(text, **kwargs)


def _read(path):
    from .manifest import read

    return read(path)


def _read_to_update(path, force: bool):
    """MANIFEST for a stage that writes it back, guarded before the work so a refusal costs none
    (after the read, so a table that is no manifest at all gets that reason)."""
    from .manifest import guard_output

    m = _read(path)
    guard_output(path, force=force)
    return m


def _write_back(df, path, stage: str, recorded: dict, force: bool):
    from .manifest import write

    # MANIFEST is rewritten in place: through the guard, so a table labelprep did not write
    # (no sidecar) gains the stage's columns only with --force
    write(df, path, meta=options.sidecar(stage, recorded), force=force)


@click.group(cls=_Group, context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="labelprep")
def main():
    """Turn folders of labeled images into a clean, leak-free, well-balanced training set.

    A typical run is one command: `labelprep prepare ROOT --out DIR`. The stage commands
    (scan, check, group, split, report) do the same steps one at a time on a manifest, a CSV
    (or Parquet) table with one row per file. Source images are only ever read.
    """


@main.command()
@click.argument("roots", metavar="ROOT...", nargs=-1, required=True, type=_existing_root)
@click.option("-o", "--output", "output", required=True, type=click.Path(path_type=Path),
              metavar="MANIFEST", help="Manifest to write (.csv, or .parquet with pyarrow). "
                                       "If it exists, unchanged files are not decoded again.")
@SCAN_OPTIONS
@click.option("--partitions", type=click.IntRange(min=1), default=None, metavar="N",
              help="Write MANIFEST (a .parquet name) as a folder of N Parquet part files.")
@_force
@_quiet
def scan(roots, output, partitions, force, quiet, **chosen):
    """Index every file under each ROOT: label, size, format, digests and perceptual hash.

    A ROOT is a folder or a .zip, .tar, .tar.gz or .tgz archive; archives below a ROOT are read
    member by member in place. With several ROOTs each is a source: paths start with its name
    and the source column says it. A rescan decodes only new and changed files (by size and
    modification time); an interrupted scan resumes from the journal it keeps beside MANIFEST.
    """
    from .advice import scan_notes
    from .scanner import scan_to

    root = roots[0] if len(roots) == 1 else list(roots)
    m, facts = scan_to(root, output, partitions=partitions, force=force, progress=_progress(quiet), **chosen)
    _say(quiet, f"{len(m)} files indexed ({facts.get('probed', 0)} decoded, "
                f"{facts.get('reused', 0)} unchanged), layout {_layouts(facts.get('layout'))} -> {output}")
    for line in scan_notes(facts):
        click.echo(line, err=True)


def _layouts(chosen) -> str:
    """The layout, or with several roots each source's: ``old: folders, new: table``."""
    return ", ".join(f"{name}: {how}" for name, how in chosen.items()) if isinstance(chosen, dict) else str(chosen)


def _print_issues(m, quiet: bool, checked: dict, examples: int = 3):
    """The issue lines; ``checked``, the check options the run used, words the reasons."""
    from .checks import limits_of, summary_lines

    for line in summary_lines(m, examples=examples, limits=limits_of(**checked)):
        _say(quiet, line)


def _gate(m, fail_on: str, empty=()):
    from .codes import gate
    from .errors import GateFailed

    failing = gate(m["issues"], "never" if fail_on == "empty" else fail_on)
    if failing:
        listed = ", ".join(f"{c} ({n})" for c, n in failing.items())
        raise GateFailed(f"--fail-on {fail_on}: {listed}")
    if empty and fail_on != "never":
        raise GateFailed(f"--fail-on {fail_on}: {empty[0]}")


def _warn(lines):
    for line in lines:
        click.echo(line if line.startswith(("warning: ", "note: ")) else f"warning: {line}", err=True)


@main.command()
@click.argument("manifest_path", metavar="MANIFEST", type=_existing_manifest)
@CHECK_OPTIONS
@_fail_on
@_force
@_quiet
def check(manifest_path, fail_on, force, quiet, **limits):
    """Flag broken, truncated, tiny, misnamed and risky files in MANIFEST.

    The codes are written back into the manifest's issues column; no row is removed. Per code
    it prints the count and the first files with a reason; --fail-on sets the exit status.
    """
    from .checks import check as run

    m = run(_read_to_update(manifest_path, force), **limits)
    _write_back(m, manifest_path, "check", {**options.record(limits, "check"), "fail_on": fail_on},
                force)
    _print_issues(m, quiet, limits)
    _gate(m, fail_on)


@main.command()
@click.argument("manifest_path", metavar="MANIFEST", type=_existing_manifest)
@GROUP_OPTIONS
@_decisions
@_force
@_quiet
def group(manifest_path, decisions, force, quiet, **chosen):
    """Find exact and near-duplicate clusters in MANIFEST (dup_group, bundle, keeper columns).

    The decisions file is honoured: separate and join change the links, drop, relabel and keep
    the rows (decided column).
    """
    from .clusters import group as run
    from .decisions import apply, digest_of, findings

    decided = _load_decisions(decisions, manifest_path.parent)
    m = apply(run(apply(_read_to_update(manifest_path, force), decided), progress=_progress(quiet),
                  decisions=decided, **chosen), decided)
    _write_back(m, manifest_path, "group",
                {**options.record(chosen, "group"), "decisions": digest_of(decided)}, force)
    _tell_decisions(findings(m, decided))
    in_clusters = int(m["dup_group"].notna().sum())
    _say(quiet, f"{m['dup_group'].nunique()} near-duplicate clusters holding {in_clusters} files")


@main.command()
@click.argument("manifest_path", metavar="MANIFEST", type=_existing_manifest)
@VET_OPTIONS
@click.option("--root", type=_existing_root, default=None,
              help="Folder the manifest's paths are relative to (default: from the sidecar); "
                   "needed by the learned features only.")
@_force
@_quiet
def vet(manifest_path, root, force, quiet, **chosen):
    """Find files that look mislabelled (likely_label) and files far from every class.

    Each file's nearest neighbours in feature space vote on its label, out of fold (its
    byte-identical copies do not vote). Writes likely_label, label_doubt, oddness, peer_same,
    peer_other and the warnings suspect-label and lone-image into MANIFEST.
    """
    from .embedding import cache_path, features_for
    from .labelcheck import vet as run
    from .manifest import read_sidecar

    m = _read_to_update(manifest_path, force)
    vectors, facts = features_for(m, root or _root_from(read_sidecar(manifest_path)),
                                  cache=cache_path(manifest_path), progress=_progress(quiet),
                                  **options.for_stage("features", chosen))
    m = run(m, embeddings=vectors, **options.for_stage("vet", chosen))
    _write_back(m, manifest_path, "vet", {**options.record(chosen, "features", "vet"), **facts}, force)
    facts = m.attrs["vet"]
    _say(quiet, f"{facts['vetted']} files vetted on {facts['features']} features: "
                f"{facts['suspect']} suspect-label, {facts['lone']} lone-image")
    # the check codes' reasons are worded with the limits the manifest was checked with
    stages = read_sidecar(manifest_path).get("stages", {})
    checked = stages.get("check", stages.get("prepare", {})).get("options", {})
    _print_issues(m, quiet, options.for_stage("check", checked))


@main.command()
@click.argument("manifest_path", metavar="MANIFEST", type=_existing_manifest)
@SPLIT_OPTIONS
@_fail_on_split
@_decisions
@_force
@_quiet
def split(manifest_path, fail_on, decisions, force, quiet, **chosen):
    """Assign train/val/test so that no cluster or group spans two splits.

    Two ratios mean train,test. With --folds K the split holds train and test and every train
    file gets a fold 0..K-1. With --keep-from, files found in OLD_MANIFEST (by sha256, then
    path) keep their split and only new files are placed. A manifest of a train/val/test folder
    tree keeps the split of its folders unless --resplit. When the bundles (clusters joined
    with groups) make a ratio or a class unreachable, it says why and which files bridge them.
    The decisions file's drop, relabel and keep rows are honoured; its separate and join rows
    act in group.
    """
    from .decisions import PAIR_ACTIONS, apply, digest_of, findings as decision_findings
    from .manifest import read_sidecar
    from .reports.split_findings import warning_lines
    from .split_diagnosis import diagnose_split
    from .splits import split as run, split_summary

    old = _read(chosen["keep_from"]) if chosen["keep_from"] is not None else None
    decided = _load_decisions(decisions, manifest_path.parent)
    m = apply(run(apply(_read_to_update(manifest_path, force), decided), progress=_progress(quiet),
                  **{**chosen, "keep_from": old}), decided)
    stages = read_sidecar(manifest_path).get("stages", {})
    grouped = (stages.get("group", {}).get("options", {}).get("decisions")
               or stages.get("prepare", {}).get("decisions") or {})
    if decided["action"].isin(PAIR_ACTIONS).any() and grouped.get("sha256") != decided.attrs.get("sha256"):
        click.echo("warning: the decisions file has separate/join rows that group has not seen; "
                   "run labelprep group first for them to take effect", err=True)
    _write_back(m, manifest_path, "split",
                {**options.record(chosen, "split"), "decisions": digest_of(decided)}, force)
    _tell_decisions(decision_findings(m, decided))
    summary = split_summary(m)
    sizes = [f"{name}: {count}" for name, count in summary["splits"].items()]
    sizes += [f"fold {k}: {count}" for k, count in summary["folds"].items()]
    _say(quiet, "  ".join(sizes + [f"left out: {summary['left_out']}"]))
    empty = _print_split_notes(m, old, quiet, ratios=chosen["ratios"], folds=chosen["folds"],
                               resplit=chosen["resplit"])
    findings = diagnose_split(m, ratios=chosen["ratios"], folds=chosen["folds"])
    for line in warning_lines(findings):
        _say(quiet, line, err=True)
    _gate_split(findings, fail_on, empty)


def _print_split_notes(m, old, quiet: bool, *, ratios, folds, resplit=False) -> list:
    """What was kept of the earlier manifest ``old`` (or of the given split, unless ``resplit``),
    then warnings for empty splits and classes and for thin folds; returns the empty-split
    warnings. (Classes missing from a split are told by the split diagnosis.)"""
    from .advice import empty_parts, fold_warnings, keep_lines
    from .splits import given_assignment, split_summary

    given = given_assignment(m) if old is None and not resplit else None
    summary = split_summary(m, keep_from=old if given is None else given)
    if "kept" in summary:
        lines = keep_lines(summary, m)
        if given is not None:
            lines[0] = "kept the split of the train/val/test folders (--resplit splits anew): " + lines[0]
        _say(quiet, lines[0])
        _warn(lines[1:])
    empty = empty_parts(m, ratios=ratios, folds=folds)
    _warn(empty + fold_warnings(summary, folds))
    return empty


def _gate_split(findings, fail_on: str, empty=()):
    from .errors import GateFailed

    if fail_on in (SHORTFALL, "empty") and empty:
        raise GateFailed(f"--fail-on {fail_on}: {empty[0]}")
    if fail_on == SHORTFALL and findings is not None and not findings["reached"]:
        raise GateFailed(f"--fail-on {SHORTFALL}: the split misses its targets "
                         f"(cause: {findings['cause']})")


@main.command()
@click.argument("manifest_path", metavar="MANIFEST", type=_existing_manifest)
@click.option("--json", "json_path", type=click.Path(path_type=Path), help="Write the summary as JSON.")
@click.option("--markdown", "md_path", type=click.Path(path_type=Path), help="Write a Markdown report.")
@click.option("--html", "html_path", type=click.Path(path_type=Path),
              help="Write a self-contained HTML report with thumbnails.")
@click.option("--root", type=_existing_dir, default=None,
              help="Folder the manifest's paths are relative to (default: from the manifest's sidecar).")
@_decisions
@_force
@_quiet
def report(manifest_path, json_path, md_path, html_path, root, decisions, force, quiet):
    """Class balance per split, issues and duplicate clusters of MANIFEST.

    The decisions file's drop, relabel and keep rows are shown applied; the report lists
    decisions naming files the manifest lacks.
    """
    from .decisions import apply, digest_of, findings
    from .manifest import read_sidecar
    from .reports import report as run, terminal_table

    meta = read_sidecar(manifest_path)
    root = root or _root_from(meta)
    decided = _load_decisions(decisions, manifest_path.parent)
    m = apply(_read(manifest_path), decided)
    found = findings(m, decided)
    summary = run(m, json=json_path, html=html_path, markdown=md_path, root=root, meta=meta,
                  force=force, decisions={**digest_of(decided), **found} if len(decided) else None,
                  review=manifest_path.parent)
    _tell_decisions(found)
    _say(quiet, terminal_table(summary))


def _root_from(meta: dict):
    from .sources import roots_of

    return roots_of(meta)


@main.command()
@click.argument("target", metavar="MANIFEST_OR_ROOT", type=click.Path(exists=True, path_type=Path))
@click.option("--fail-on", type=click.Choice(["leaks", "never"]), default="never", show_default=True,
              help="Exit with status 1 when any near-duplicate or group crosses splits.")
@click.option("--json", "json_path", type=click.Path(path_type=Path), help="Write the audit as JSON.")
@click.option("--max-distance", type=click.IntRange(0, 64), default=None, metavar="BITS",
              help="Hash radius of a near-duplicate (default: what the manifest was grouped with, else "
                   f"{defaults.MAX_DISTANCE}).")
@click.option("--flips/--no-flips", default=None,
              help="Count mirrored copies (default: as the manifest was grouped, else yes).")
@SCAN_OPTIONS
@_decisions
@_force
@_quiet
def audit(target, fail_on, json_path, max_distance, flips, decisions, force, quiet, **scan_options):
    """Leaks and class balance of an existing split.

    MANIFEST_OR_ROOT is a manifest with a split column, or a folder laid out as
    ROOT/<train|val|test>/<label>/... (scanned first, in memory only). Pairs the decisions
    file separates (beside the manifest, or --decisions) are not copies, so no leak.
    """
    from .audits import audit_path, leak_gate, render

    # beside a manifest file its decisions.csv applies; a scanned folder has none unless given
    decided = _load_decisions(decisions, target.parent) if decisions is not None or not target.is_dir() else None
    result = audit_path(target, max_distance=max_distance, flips=flips, progress=_progress(quiet),
                        decisions=decided, **scan_options)
    if json_path is not None:
        import json

        from .manifest import write_text

        write_text(json_path, json.dumps(result, indent=2, sort_keys=True) + "\n", force=force)
    _say(quiet, render(result))
    leak_gate(result, fail_on)


@main.command()
@click.argument("manifest_path", metavar="MANIFEST", type=_existing_manifest)
@click.argument("dest", type=click.Path(file_okay=False, path_type=Path))
@click.option("--mode", type=click.Choice(["hardlink", "symlink", "copy"]), default="hardlink",
              show_default=True, help="How files are placed; hardlinks fall back to copies across filesystems.")
@click.option("--strip-metadata", is_flag=True, help="On copies, remove EXIF location data.")
@click.option("--root", type=_existing_dir, default=None,
              help="Folder the manifest's paths are relative to (default: from the manifest's sidecar).")
@_force
@_quiet
def export(manifest_path, dest, mode, strip_metadata, root, force, quiet):
    """Lay out DEST/<split>/<label>/<file> and DEST/<split>.csv for any training framework."""
    from .exports import export as run

    # given the path, export reads the manifest and finds the root in its sidecar
    written = run(manifest_path, dest, root=root, mode=mode, force=force,
                  strip_metadata=strip_metadata, progress=_progress(quiet))
    methods = written["method"].value_counts()  # a hardlink falls back to a copy across filesystems
    _say(quiet, f"{len(written)} files placed under {dest}: "
                + ", ".join(f"{n} {method}" for method, n in methods.items()))
    classes = set(written["label"])
    for name, rows in written.groupby("split", sort=False):
        if set(rows["label"]) != classes:
            _warn([f"{name} has no folder for {', '.join(sorted(classes - set(rows['label'])))}: read "
                   f"every split with the class list {dest / 'classes.txt'} so the indices match"])


@main.command()
@click.argument("roots", metavar="ROOT...", nargs=-1, required=True, type=_existing_root)
@click.option("--out", "out", required=True, type=click.Path(file_okay=False, path_type=Path),
              metavar="DIR", help="Folder for manifest.csv, report.json and report.html.")
@options.click_options(*options.STAGES)
@_decisions
@_fail_on_prepare
@_force
@_quiet
def prepare(roots, out, fail_on, quiet, **chosen):
    """Scan, check, group, vet, split and report each ROOT in one go, into DIR.

    A ROOT is a folder or an archive; with several, each is a source (see scan). Nothing in DIR
    is indexed, nor a label table stored inside ROOT. A tree of train/val/test folders keeps its
    split unless --resplit.
    """
    from .pipeline import prepare as run

    root = roots[0] if len(roots) == 1 else list(roots)
    m, summary = run(root, out, progress=_progress(quiet), **chosen)
    empty = _print_outcome(m, summary, out, quiet, options.for_stage("check", chosen), chosen)
    _tell_decisions(summary["decisions"])
    if fail_on == SHORTFALL:
        _gate_split(summary["split_diagnosis"], fail_on, empty)
    else:
        _gate(m, fail_on, empty)


def _print_outcome(m, summary, out: Path, quiet: bool, checked: dict, chosen=None) -> list:
    """The tables, issues and notes of a prepare run (``chosen``: its options, None for the
    demo's); returns the empty-split warnings."""
    from .advice import scan_notes
    from .manifest import read_sidecar
    from .reports import terminal_table

    # the issues are listed once, with their counts and first files, after the tables
    _say(quiet, terminal_table(summary, issues=False))
    _say(quiet, "\nissues, with the first three files each (the manifest lists them all):")
    _print_issues(m, quiet, checked)
    _say(quiet, f"\nwrote {out / 'manifest.csv'}, {out / 'report.json'}, {out / 'report.html'}")
    for line in scan_notes(read_sidecar(out / "manifest.csv")["stages"]["prepare"].get("scan", {})):
        click.echo(line, err=True)
    chosen = chosen or {}
    keep = chosen.get("keep_from")
    old = _read(keep) if keep is not None else None
    return _print_split_notes(m, old, quiet, ratios=chosen.get("ratios"), folds=chosen.get("folds"),
                              resplit=chosen.get("resplit", False))


@main.command()
@click.argument("folder", metavar="DIR", type=_existing_dir)
@click.option("--decisions", type=click.Path(dir_okay=False, path_type=Path), default=None,
              metavar="FILE", help="Decisions file the page writes (default: DIR/decisions.csv).")
@click.option("--port", type=click.IntRange(0, 65535), default=0, show_default=True,
              help="Port on 127.0.0.1; 0 picks a free one.")
@click.option("--no-browser", is_flag=True, help="Print the address only; do not open a browser.")
def review(folder, decisions, port, no_browser):
    """Review what needs a human in a prepare folder DIR, on a local page, and record decisions.

    Serves a page on 127.0.0.1 (address printed with a one-time token) showing every
    near-duplicate cluster, label conflict and flagged file, a page at a time. Keys decide:
    d drop, r relabel, s separate, m/j join, k keep, u undo, Shift+R re-runs group, split and
    report. Each decision is written to the decisions file at once. Ctrl-C stops the server.
    """
    from .reviews import make_server

    server = make_server(folder, decisions=decisions, port=port)
    click.echo(f"review page: {server.url}")
    click.echo(f"decisions go to {server.decisions_path}; Ctrl-C stops")
    if not no_browser:
        import webbrowser

        webbrowser.open(server.url)
    try:
        server.serve_forever()
    except KeyboardInterrupt:
        pass
    finally:
        server.server_close()


@main.command()
@click.argument("folder", required=False, type=click.Path(file_okay=False, path_type=Path),
                default=Path("labelprep-demo"))
@click.option("--seed", type=int, default=defaults.SEED, show_default=True,
              help="Seed for both the generated images and the split.")
@_jobs
@_force
@_quiet
def demo(folder, seed, jobs, force, quiet):
    """Generate the tide-pool survey demo in FOLDER and run prepare on it.

    FOLDER/photos holds the generated images (with planted problems), FOLDER/out the results.
    """
    from .demo import GROUP_PATTERN, make_demo, planted_summary
    from .pipeline import prepare as run

    photos = make_demo(folder, seed=seed, force=force)
    _say(quiet, f"generated {photos}: {planted_summary(photos)}")
    m, summary = run(photos, folder / "out", group_pattern=GROUP_PATTERN, seed=seed,
                     jobs=jobs, force=force, progress=_progress(quiet))
    _print_outcome(m, summary, folder / "out", quiet, {})
