"""Each stage's options, declared once: the click option, the default, the sidecar record.

:data:`SPEC` lists every option of the stages ``scan``, ``check``, ``features`` (the learned
features, :func:`labelprep.embedding.features_for`), ``group``, ``vet`` and ``split``. From
it come the click options of each stage command (:func:`click_options`), the options ``prepare``
accepts and the defaults it fills in (:func:`resolve`), the keywords each stage function gets
(:func:`for_stage`) and what the sidecar records (:func:`record`). Adding an option is one
:class:`Option` line here beside the keyword on the stage function; ``tests/test_options.py``
checks that both carry the same default.

Only click and :mod:`labelprep.defaults` are imported, so ``labelprep --help`` stays fast.
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable

import click

from . import defaults

STAGES = ("scan", "check", "features", "group", "vet", "split")


def _labels(ctx, param, values):
    """``--labels`` as the library takes it: None, one table, or the SOURCE=TABLE items."""
    if values is None or isinstance(values, (str, os.PathLike, list)):
        return values  # already in the library's form (a default, or prepare called from Python)
    values = tuple(values)
    return None if not values else values[0] if len(values) == 1 and "=" not in values[0] else list(values)


def _ratios(ctx, param, value):
    if value is None or isinstance(value, (tuple, list)):
        return value
    try:
        return tuple(float(x) for x in value.split(","))
    except ValueError:
        raise click.BadParameter(f"expected numbers separated by commas such as 0.8,0.1,0.1; got {value!r}")


def _as_recorded(value):
    """An option value as the sidecar keeps it: JSON types; a table given in memory is named so."""
    if isinstance(value, tuple):
        return list(value)
    if isinstance(value, os.PathLike):
        return str(value)
    if hasattr(value, "columns"):  # keep_from given as a DataFrame
        return "(a table in memory)"
    return value


@dataclass(frozen=True)
class Option:
    """One option of one or more stages.

    ``name`` is the keyword of the stage functions; the flag is ``--name-with-hyphens``.
    ``click`` holds the keywords of :func:`click.option` other than the default, which is
    ``default``. ``recorded`` says whether the sidecar keeps the value (how the work is spread,
    such as ``jobs``, changes no result and is not kept); ``record_if_set`` keeps a flag only
    when it is on, so sidecars of runs without it stay as they were. ``help_for`` gives the
    help that the command of one stage shows instead of ``click["help"]``.
    """

    name: str
    stages: tuple
    default: Any
    click: dict = field(default_factory=dict)
    recorded: bool = True
    record_if_set: bool = False
    short: str | None = None
    negatable: bool = False  # a flag that is on by default: also --no-name to turn it off
    # the help a command of one stage shows instead (what the option does there)
    help_for: dict = field(default_factory=dict)

    @property
    def flag(self) -> str:
        return "--" + self.name.replace("_", "-")

    def decorator(self, stages=()) -> Callable:
        flag = f"{self.flag}/--no-{self.flag[2:]}" if self.negatable else self.flag
        names = [flag] + ([self.short] if self.short else [])
        kwargs = dict(self.click)
        if len(stages) == 1 and stages[0] in self.help_for:
            kwargs["help"] = self.help_for[stages[0]]
        if kwargs.get("is_flag"):
            kwargs.setdefault("default", bool(self.default))
        else:
            shown = self.default
            if isinstance(shown, tuple):
                shown = ",".join(map(str, shown))
            kwargs.setdefault("default", shown)
            kwargs.setdefault("show_default", self.default is not None)
        return click.option(*names, self.name, **kwargs)


# a manifest is a file, or a folder of part files (partitioned Parquet); manifest.read tells
_existing_manifest = click.Path(exists=True, file_okay=True, dir_okay=True, path_type=Path)

SPEC = (
    Option("layout", ("scan",), "auto", dict(
        type=click.Choice(["auto", "folders", "split-folders", "table"]),
        help="Where labels come from: ROOT/<label>/..., ROOT/<train|val|test>/<label>/..., "
             "or a label table; auto detects.")),
    Option("labels", ("scan",), None, dict(
        multiple=True, metavar="[SOURCE=]TABLE", callback=_labels, default=(),
        help="Label table (CSV in any common dialect, or Parquet) with columns path,label[,group], "
             "paths relative to ROOT. With several roots, repeat as SOURCE=TABLE, SOURCE a root's "
             "folder name as in the source column.")),
    Option("group_pattern", ("scan",), None, dict(
        metavar="REGEX",
        help="Regular expression; its first capture group in each path is the file's group "
             "(e.g. '([^/]+)_\\d+\\.jpg$' groups by name prefix).")),
    Option("group_by_source", ("scan",), False, dict(
        is_flag=True, help="With several roots, each root is one group: no source spans two splits."),
        record_if_set=True),
    Option("include_hidden", ("scan",), False, dict(
        is_flag=True,
        help="Also index hidden names (starting with '.') and system files such as Thumbs.db.")),
    Option("jobs", ("scan", "features"), None, dict(
        type=click.IntRange(min=0), default=0, show_default=True,
        help="Worker processes for decoding; 0 = every core."), recorded=False, short="-j"),
    Option("cluster", ("scan", "features", "group"), None, dict(
        metavar="ADDRESS",
        help="Run the work on the Dask cluster whose scheduler is at ADDRESS (e.g. "
             "tcp://scheduler-host:8786) instead of local processes: the decoding (every worker "
             "must see ROOT at the same path) and the near-pair search. Needs labelprep[cluster]."),
        recorded=False,
        help_for={"group": "Run the near-pair search on the Dask cluster whose scheduler is at "
                           "ADDRESS (e.g. tcp://scheduler-host:8786); the same clusters as a local "
                           "run. Needs labelprep[cluster]."}),
    Option("max_pixels", ("scan", "check"), defaults.MAX_PIXELS, dict(
        type=click.IntRange(min=1),
        help="Pixel budget per image; larger images are flagged and not decoded. "
             "Pillow itself refuses images over twice its default, whatever the budget.")),
    Option("min_side", ("check",), defaults.MIN_SIDE, dict(
        type=click.IntRange(min=1),
        help="Images whose shorter side is below this many pixels are flagged too-small.")),
    Option("max_aspect", ("check",), defaults.MAX_ASPECT, dict(
        type=click.FloatRange(min=1), metavar="RATIO",
        help="Long side over short side above this is flagged extreme-aspect.")),
    Option("min_spread", ("check",), defaults.MIN_SPREAD, dict(
        type=click.FloatRange(0, 255), metavar="LEVELS",
        help="Luminance standard deviation (0-255) below this is flagged near-blank.")),
    Option("max_distance", ("group",), defaults.MAX_DISTANCE, dict(
        type=click.IntRange(0, 64), metavar="BITS",
        help="Hamming radius on the 64-bit perceptual hash for near-duplicates.")),
    Option("keep_conflicts", ("group",), False, dict(
        is_flag=True, help="Keep clusters that span labels in the split (default: leave them out).")),
    Option("flips", ("group",), True, dict(
        is_flag=True, show_default=True,
        help="Match left-right mirrored copies too (a mirrored copy across splits is a leak); "
             "--no-flips for labels that change when mirrored, such as left/right signs."),
        negatable=True),
    Option("features", ("features",), defaults.FEATURES, dict(
        type=click.Choice(["auto", "sketch", "model"]),
        help="What vet and the same-scene check compare: 'model' runs a pretrained CNN "
             "(EfficientNet-Lite0, needs labelprep[features]) on every image, 'sketch' uses the "
             "scan's 32x32 thumbnails (no model), 'auto' the CNN when installed.")),
    Option("features_model", ("features",), None, dict(
        type=click.Path(exists=True, file_okay=True, dir_okay=False, path_type=Path), metavar="FILE",
        help="Your own ONNX model instead (float32 NCHW RGB in 0-1 at its input size; its first "
             "output is the embedding).")),
    Option("neighbours", ("vet",), defaults.NEIGHBOURS, dict(
        type=click.IntRange(min=1), help="Nearest files that vote on each file's label.")),
    Option("min_doubt", ("vet",), defaults.MIN_DOUBT, dict(
        type=click.FloatRange(0, 1, min_open=True), metavar="SHARE",
        help="Share of the votes another label needs for suspect-label.")),
    Option("max_oddness", ("vet",), defaults.MAX_ODDNESS, dict(
        type=click.FloatRange(1, min_open=True), metavar="RATIO",
        help="Oddness (1 = typical) from which a file is flagged lone-image.")),
    Option("ratios", ("split",), defaults.RATIOS, dict(
        callback=_ratios, metavar="TRAIN,VAL,TEST",
        help="train,val,test shares (two numbers: train,test).")),
    Option("seed", ("split", "vet"), defaults.SEED, dict(
        type=int, help="Random seed; the same seed and files give the same split.")),
    Option("folds", ("split",), None, dict(
        type=click.IntRange(min=2), help="Also write a fold column with K cross-validation folds.")),
    Option("keep_from", ("split",), None, dict(
        type=_existing_manifest, metavar="OLD_MANIFEST",
        help="Keep every file already assigned in this manifest where it was; place only new files.")),
    Option("resplit", ("split",), False, dict(
        is_flag=True,
        help="On a ROOT/<train|val|test>/<label>/ tree, split anew; by default every file stays "
             "in its folder's split and only files outside those folders are placed."),
        record_if_set=True),
)
BY_NAME = {option.name: option for option in SPEC}


def of(*stages: str) -> list:
    """The options of ``stages`` in :data:`SPEC` order, each once."""
    unknown = set(stages) - set(STAGES)
    if unknown:
        raise ValueError(f"unknown stage {sorted(unknown)[0]!r}; stages are {', '.join(STAGES)}")
    return [option for option in SPEC if set(option.stages) & set(stages)]


def click_options(*stages: str) -> Callable:
    """One decorator adding the click options of ``stages`` to a command."""
    decorators = [option.decorator(stages) for option in of(*stages)]

    def apply(func):
        for deco in reversed(decorators):
            func = deco(func)
        return func
    return apply


def resolve(values: dict, *stages: str) -> dict:
    """``values`` with the default of every option of ``stages`` it leaves out.

    Raises
    ------
    TypeError
        A key that is no option of ``stages`` (as Python does for an unknown keyword).
    """
    known = {option.name: option.default for option in of(*stages)}
    unknown = sorted(set(values) - set(known))
    if unknown:
        raise TypeError(f"unexpected option {unknown[0]!r}; the options of {', '.join(stages)} are "
                        f"{', '.join(known)}")
    return {**known, **values}


def for_stage(stage: str, values: dict) -> dict:
    """The keywords of ``values`` that the function of ``stage`` takes."""
    return {option.name: values[option.name] for option in of(stage) if option.name in values}


def record(values: dict, *stages: str) -> dict:
    """What the sidecar keeps of ``values``: the recorded options of ``stages``, JSON-able."""
    kept = {}
    for option in of(*stages):
        if not option.recorded or option.name not in values:
            continue
        if option.record_if_set and not values[option.name]:
            continue
        kept[option.name] = _as_recorded(values[option.name])
    return kept


def sidecar(key: str, recorded: dict, **facts) -> dict:
    """The sidecar entry of one run: ``recorded`` (from :func:`record`) and ``facts`` under
    ``stages[key]``, and the seed at the top when the run split.

    The top-level ``seed`` is the one the report shows, so every run that splits (``split``,
    ``prepare``) sets it through here: it is always the seed of the split the manifest holds.
    """
    meta = {"stages": {key: {"options": recorded, **facts}}}
    if "seed" in recorded:
        meta["seed"] = recorded["seed"]
    return meta
