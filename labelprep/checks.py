"""The check stage: facts from the probe -> issue codes, with the limits they use.

Each code has one :class:`_Rule`: a vectorised test over the manifest (a boolean mask) and a
one-line reason for a flagged row. :data:`RULES` maps each code the stage owns to its rule. Limits
are plain keyword options of :func:`check`; the command line records them in the sidecar.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

from . import codes, defaults
from .errors import ParameterError
from .validation import check_manifest

# probe faults that have a code of their own (see RULES); any other fault (a decoder error, a
# damaged header) is reported as unreadable, so no failed file can come out clean
_OWN_CODE_FAULTS = ("empty", "not-image", "truncated", "corrupt", "pixel-limit", "symlink", "timeout",
                    "bad-name", "no-decoder", "unsafe-member")
# the modes every loader handles as they are; anything else is unusual-mode
_PLAIN_MODES = frozenset({"RGB", "L", "P"})
_MODE_NOTES = {"CMYK": "CMYK colour (4 ink channels)", "I": "32-bit integer samples (I)",
               "F": "32-bit float samples (F)", "1": "1-bit black and white",
               "YCbCr": "YCbCr colour, not RGB", "LAB": "L*a*b* colour, not RGB",
               "HSV": "HSV colour, not RGB"}
# the facts the rules read, beyond the core columns
_NEEDED = ("path", "label", "format", "width", "height", "mode", "bits", "frames", "has_alpha",
           "has_gps", "spread", "fault", "fault_detail")


@dataclass(frozen=True)
class _Rule:
    """How one code is found (``flags(df, limits)`` -> boolean Series) and explained."""

    flags: Callable
    explain: Callable  # (row, limits) -> str


def _detail(row, limits) -> str:
    return str(row.get("fault_detail") or row.get("fault") or "")


def _fault_rule(fault: str) -> _Rule:
    return _Rule(lambda df, limits: df["fault"].eq(fault), _detail)


def _unreadable(df, limits):
    return df["fault"].ne("") & ~df["fault"].isin(_OWN_CODE_FAULTS)


def _known(value) -> bool:
    import pandas as pd

    return not pd.isna(value)


def _size(row) -> str:
    return f"{row['width']}x{row['height']}"


def _pixel_limit(df, limits):
    pixels = (df["width"].astype("Float64") * df["height"].astype("Float64")).fillna(0)
    return df["fault"].eq("pixel-limit") | (pixels > limits["max_pixels"])


def _why_pixel_limit(row, limits) -> str:
    if _known(row["width"]) and _known(row["height"]):
        pixels = int(row["width"]) * int(row["height"])
        if pixels > limits["max_pixels"]:
            return f"{_size(row)} = {pixels:,} pixels, over the budget of {limits['max_pixels']:,}"
        return f"{_size(row)}: over the budget of the scan, so not decoded; scan again with a larger --max-pixels"
    return _detail(row, limits)


def _too_small(df, limits):
    side = df[["width", "height"]].min(axis=1)
    return (side < limits["min_side"]).fillna(False)


def _no_label(df, limits):
    return df["label"].eq("") & ~df["fault"].eq("symlink")


def _wrong_extension(df, limits):
    from .formats import format_of_extension

    named = df["path"].map(format_of_extension)
    return df["format"].ne("") & named.ne("") & named.ne(df["format"])


def _why_wrong_extension(row, limits) -> str:
    name = row["path"].rsplit("/", 1)[-1]
    return f"named {name[name.rfind('.'):]} but the content is {row['format']}"


def _extreme_aspect(df, limits):
    long_side = df[["width", "height"]].max(axis=1).astype("Float64")
    short_side = df[["width", "height"]].min(axis=1).astype("Float64")
    return (long_side / short_side.where(short_side > 0) > limits["max_aspect"]).fillna(False)


def _why_extreme_aspect(row, limits) -> str:
    w, h = int(row["width"]), int(row["height"])
    return f"{_size(row)}, {max(w, h) / min(w, h):.1f}:1, beyond {limits['max_aspect']:g}:1"


def _unusual_mode(df, limits):
    mode = df["mode"]
    deep = (df["bits"] > 8).fillna(False).astype(bool)
    alpha = df["has_alpha"].fillna(False).astype(bool)
    return mode.ne("") & (~mode.isin(list(_PLAIN_MODES)) | alpha | deep)


def _why_unusual_mode(row, limits) -> str:
    mode, bits = row["mode"], row["bits"]
    notes = []
    if mode.startswith("I;16"):
        notes.append(f"16-bit grey samples ({mode})")
    elif mode in _MODE_NOTES:
        notes.append(_MODE_NOTES[mode])
    elif _known(bits) and bits > 8:
        notes.append(f"{int(bits)}-bit samples, which Pillow reads as 8-bit {mode}")
    if _known(row["has_alpha"]) and row["has_alpha"]:
        if mode == "P":
            notes.append("palette with a transparent entry")
        elif mode in _PLAIN_MODES:
            notes.append(f"{mode} with a transparent colour key")
        else:
            notes.append(f"alpha channel ({mode})")
    return "; ".join(notes) or f"mode {mode}"


RULES: dict[str, _Rule] = {
    "empty-file": _fault_rule("empty"),
    "not-image": _fault_rule("not-image"),
    "unreadable": _Rule(_unreadable, _detail),
    "truncated": _fault_rule("truncated"),
    "corrupt": _fault_rule("corrupt"),
    "pixel-limit": _Rule(_pixel_limit, _why_pixel_limit),
    "link-skipped": _fault_rule("symlink"),
    "timed-out": _fault_rule("timeout"),
    "undecodable-name": _fault_rule("bad-name"),
    "no-decoder": _fault_rule("no-decoder"),
    "unsafe-member": _fault_rule("unsafe-member"),
    "too-small": _Rule(_too_small, lambda row, limits:
                       f"{_size(row)}, shorter side under {limits['min_side']} px; "
                       f"a lower --min-side keeps it"),
    "no-label": _Rule(_no_label, lambda row, limits: "no class label: outside every class folder and label table row"),
    "wrong-extension": _Rule(_wrong_extension, _why_wrong_extension),
    "extreme-aspect": _Rule(_extreme_aspect, _why_extreme_aspect),
    "multi-frame": _Rule(lambda df, limits: (df["frames"] > 1).fillna(False),
                         lambda row, limits: f"{row['frames']} frames; loaders read only the first"),
    "unusual-mode": _Rule(_unusual_mode, _why_unusual_mode),
    "near-blank": _Rule(lambda df, limits: (df["spread"] < limits["min_spread"]).fillna(False),
                        lambda row, limits: f"luminance spread {row['spread']:.2f}, under "
                                            f"{limits['min_spread']:g}: nearly one flat colour"),
    "has-location": _Rule(lambda df, limits: df["has_gps"].fillna(False).astype(bool),
                          lambda row, limits: "EXIF GPS position present"),
}


def limits_of(*, min_side: int = defaults.MIN_SIDE, max_pixels: int = defaults.MAX_PIXELS,
              max_aspect: float = defaults.MAX_ASPECT, min_spread: float = defaults.MIN_SPREAD) -> dict:
    """The validated limits :func:`check` uses, as a dict (also what goes in the sidecar).

    Examples
    --------
    >>> limits_of(min_side=64)["min_side"]
    64
    >>> limits_of(max_aspect=0.5)
    Traceback (most recent call last):
    ...
    labelprep.errors.ParameterError: max_aspect must be >= 1 (long side over short side); got max_aspect=0.5
    """
    for name, value in (("min_side", min_side), ("max_pixels", max_pixels)):
        if isinstance(value, bool) or not isinstance(value, int):
            raise TypeError(f"{name} must be an int; got {type(value).__name__}")
        if value < 1:
            raise ParameterError(f"{name} must be >= 1; got {name}={value}")
    for name, value in (("max_aspect", max_aspect), ("min_spread", min_spread)):
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise TypeError(f"{name} must be a number; got {type(value).__name__}")
    if not max_aspect >= 1:
        raise ParameterError(f"max_aspect must be >= 1 (long side over short side); got max_aspect={max_aspect}")
    if not 0 <= min_spread <= 255:
        raise ParameterError(f"min_spread must be within 0..255 (luminance levels); got min_spread={min_spread}")
    return {"min_side": min_side, "max_pixels": max_pixels, "max_aspect": float(max_aspect),
            "min_spread": float(min_spread)}


def check(manifest, *, min_side: int = defaults.MIN_SIDE, max_pixels: int = defaults.MAX_PIXELS,
          max_aspect: float = defaults.MAX_ASPECT, min_spread: float = defaults.MIN_SPREAD):
    """Flag every file that is unusable or risky, with one code per reason.

    Parameters
    ----------
    manifest : DataFrame
        A scanned manifest (see :func:`labelprep.scan`).
    min_side : int
        Shorter side below this many pixels is ``too-small`` (default 32).
    max_pixels : int
        Images over this many pixels are ``pixel-limit`` (default: Pillow's limit, 89,478,485).
    max_aspect : float
        Long side over short side above this is ``extreme-aspect`` (default 3).
    min_spread : float
        Luminance standard deviation (0-255) below this is ``near-blank`` (default 2).

    Returns
    -------
    DataFrame
        A copy with the ``issues`` column updated; no row is removed.

    Raises
    ------
    InputError
        When the manifest lacks a column the rules read (it was not made by a scan).

    Examples
    --------
    >>> import pandas as pd
    >>> m = pd.DataFrame({"path": ["a/x.jpg", "a/y.png"], "label": ["a", "a"],
    ...                   "format": ["jpeg", "jpeg"], "width": [640, 20], "height": [480, 16],
    ...                   "mode": ["RGB", "CMYK"], "bits": [8, 8], "frames": [1, 1],
    ...                   "has_alpha": [False, False],
    ...                   "has_gps": [False, True], "spread": [40.0, 35.0], "fault": ["", ""],
    ...                   "fault_detail": ["", ""]})
    >>> check(m)["issues"].tolist()
    ['', 'has-location;too-small;unusual-mode;wrong-extension']
    """
    check_manifest(manifest, _NEEDED, hint="make it with labelprep scan")
    limits = limits_of(min_side=min_side, max_pixels=max_pixels, max_aspect=max_aspect,
                       min_spread=min_spread)
    out = manifest.copy()
    if "issues" not in out.columns:
        out["issues"] = ""
    found = {code: rule.flags(out, limits).to_numpy(dtype=bool) for code, rule in RULES.items()}
    out["issues"] = codes.replace_stage_codes(out["issues"], "check", found)
    return out


def reason(row, code: str, *, limits: dict | None = None) -> str:
    """One line saying why ``row`` carries check code ``code``, e.g. ``"20x16, shorter side under 32 px"``.

    Parameters
    ----------
    row : mapping
        A manifest row (a pandas Series or a dict of its columns).
    code : str
        One of the check stage's codes.
    limits : dict, optional
        The limits the check ran with (:func:`limits_of`); the defaults when not given.
    """
    rule = RULES.get(code)
    if rule is None:
        raise ParameterError(f"code must be one of the check stage's codes; got code={code!r}")
    return rule.explain(row, limits or limits_of())


def summary_lines(manifest, *, examples: int = 3, limits: dict | None = None) -> list[str]:
    """Lines for the terminal: per code its severity and count, then the first few files and why.

    ``limits`` are those the manifest was checked with (:func:`limits_of` of the check's
    options); the defaults when not given.
    """
    from .advice import copy_match

    limits = limits or limits_of()
    tally = codes.counts(manifest["issues"])
    if not tally:
        return ["no issues found"]
    cells = manifest["issues"].map(codes.parse)
    lines = []
    for code, n in tally.items():
        info = codes.CODES.get(code)
        lines.append(f"{code:<16} {info.severity if info else '?':<8} {n:>6} file{'s' if n != 1 else ''}")
        hit = manifest[cells.map(lambda cs: code in cs)]
        for _, row in hit.head(examples).iterrows():
            if code in RULES:
                why = reason(row, code, limits=limits)
            elif info is not None and info.stage == "group":
                why = copy_match(manifest, row, code)  # names the file it matches
            else:
                why = info.meaning if info else ""
            lines.append(f"    {row['path']}: {why}")
        if n > examples:
            lines.append(f"    ... and {n - examples} more")
    return lines
