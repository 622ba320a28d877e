"""Issue codes: the registry behind the manifest's ``issues`` column, and helpers to edit it.

Each code has exactly one severity. An *error* keeps the row out of the split; a *warning* is
reported and the row is still used. A stage owns its codes: re-running it first removes the codes
it owns and then adds what it finds, so stages can be run again in any order.
"""

from __future__ import annotations

from dataclasses import dataclass

ERROR = "error"
WARNING = "warning"


@dataclass(frozen=True)
class IssueCode:
    code: str
    severity: str
    stage: str
    meaning: str


_CODE_LIST = [
    IssueCode("empty-file", ERROR, "check", "the file has zero bytes"),
    IssueCode("not-image", ERROR, "check", "the first bytes match no image format labelprep reads"),
    IssueCode("unreadable", ERROR, "check", "the file is an image format but cannot be opened or decoded"),
    IssueCode("truncated", ERROR, "check", "the image data stops before its end (cut-off download or copy)"),
    IssueCode("corrupt", ERROR, "check", "the bytes break the format's integrity rules (e.g. a chunk checksum), so the pixels cannot be trusted"),
    IssueCode("pixel-limit", ERROR, "check", "width x height is over the pixel budget (decompression-bomb guard); not decoded"),
    IssueCode("too-small", ERROR, "check", "the shorter side is below the minimum side length"),
    IssueCode("no-label", ERROR, "check", "the file has no class label"),
    IssueCode("link-skipped", ERROR, "check", "a symbolic link; links are not followed, so it is not indexed"),
    IssueCode("timed-out", ERROR, "check", "reading and decoding the file took longer than the per-file time limit; given up"),
    IssueCode("undecodable-name", ERROR, "check", "the file or folder name is not valid UTF-8; listed with \\x escapes, not read (rename it to index it)"),
    IssueCode("no-decoder", ERROR, "check", "an image format labelprep recognises but this installation cannot decode; the reason names the extra to install"),
    IssueCode("unsafe-member", ERROR, "check", "an archive member refused unread: an absolute or '..' name, a link, a declared size over the budget or a compression ratio of a bomb"),
    IssueCode("wrong-extension", WARNING, "check", "the file name's extension names another format than its content"),
    IssueCode("extreme-aspect", WARNING, "check", "one side is many times the other (strip, banner, panorama); resizing to a square distorts it"),
    IssueCode("multi-frame", WARNING, "check", "an animation or multi-page file; loaders read only its first frame"),
    IssueCode("unusual-mode", WARNING, "check", "pixels a training loader may mishandle: CMYK, 16-bit or float samples, alpha, transparent palette"),
    IssueCode("near-blank", WARNING, "check", "almost one flat colour (luminance spread under the limit): blank, lens cap, failed capture"),
    IssueCode("has-location", WARNING, "check", "EXIF GPS position present: a privacy risk if the data set is shared"),
    IssueCode("exact-copy", WARNING, "group", "byte-identical to another file"),
    IssueCode("near-copy", WARNING, "group", "the same picture as another file that is not byte-identical to it: proposed by the perceptual hashes, confirmed on the pixels"),
    IssueCode("mirrored-label", WARNING, "group", "a left-right mirrored copy of a file under another label: right if mirroring changes the class (then group without mirror matching), otherwise one label is wrong"),
    IssueCode("label-conflict", ERROR, "group", "its near-duplicate cluster holds more than one label"),
    IssueCode("thin-class", WARNING, "split", "its class has fewer bundles than there are splits (or folds), so some split lacks it"),
    IssueCode("dropped", ERROR, "decisions", "a drop decision in the decisions file leaves the file out of the split"),
]

CODES: dict[str, IssueCode] = {c.code: c for c in _CODE_LIST}


def codes_of(stage: str) -> list[str]:
    """Every code a stage owns."""
    return [c.code for c in _CODE_LIST if stage in c.stage.split(", ")]


def parse(cell: str) -> list[str]:
    """The codes in one ``issues`` cell."""
    return [c for c in str(cell).split(";") if c]


def join(codes) -> str:
    """One ``issues`` cell from codes: unique, sorted, ``;``-separated."""
    return ";".join(sorted(set(codes)))


def replace_stage_codes(issues, stage: str, found: dict):
    """Return ``issues`` (a Series of cells) with ``stage``'s codes replaced by ``found``.

    Parameters
    ----------
    issues : pandas.Series of str
    stage : str
        The stage whose earlier codes are removed.
    found : dict
        ``{code: boolean mask aligned with issues}`` of what the stage found now.
    """
    import numpy as np

    owned = set(codes_of(stage))
    unknown = set(found) - owned
    if unknown:
        raise ValueError(f"stage {stage!r} does not own codes {sorted(unknown)}")
    masks = {code: np.asarray(mask, dtype=bool) for code, mask in found.items()}
    cells = issues.to_numpy(dtype=object).copy()
    # most rows are clean and stay clean: rebuild only the cells that hold or gain a code
    touched = cells != ""
    for mask in masks.values():
        touched |= mask
    for i in np.flatnonzero(touched):
        kept = [c for c in parse(cells[i]) if c not in owned]
        kept += [code for code, mask in masks.items() if mask[i]]
        cells[i] = join(kept)
    return issues.__class__(cells, index=issues.index, dtype=issues.dtype)


def errors_mask(issues):
    """Boolean Series: the row carries at least one error code (so it is left out of the split)."""
    import numpy as np
    import pandas as pd

    error_codes = {c.code for c in _CODE_LIST if c.severity == ERROR}
    cells = issues.to_numpy(dtype=object)
    flagged = np.zeros(len(cells), dtype=bool)
    for i in np.flatnonzero(cells != ""):  # clean rows (most of them) need no parsing
        flagged[i] = any(c in error_codes for c in parse(cells[i]))
    return pd.Series(flagged, index=issues.index)


def counts(issues) -> dict[str, int]:
    """How many rows carry each code, in registry order."""
    tally: dict[str, int] = {}
    for cell in issues.tolist():
        for c in parse(cell):
            tally[c] = tally.get(c, 0) + 1
    order = {c: i for i, c in enumerate(CODES)}
    return dict(sorted(tally.items(), key=lambda kv: (order.get(kv[0], len(order)), kv[0])))


FAIL_ON = ("error", "warning", "never")


def gate(issues, fail_on: str) -> dict[str, int]:
    """The codes that fail a ``fail_on`` gate, with their counts; empty when the data passes.

    ``"error"`` fails on any error code, ``"warning"`` on any code at all, ``"never"`` never.
    """
    if fail_on not in FAIL_ON:
        from .errors import ParameterError

        raise ParameterError(f"fail_on must be one of {', '.join(FAIL_ON)}; got fail_on={fail_on!r}")
    if fail_on == "never":
        return {}
    tally = counts(issues)
    if fail_on == "error":
        return {c: n for c, n in tally.items() if CODES.get(c) is not None and CODES[c].severity == ERROR}
    return tally
