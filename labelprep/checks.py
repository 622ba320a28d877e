"""The check stage: facts from the probe -> issue codes, with the limits they use.

Each rule is one function of the manifest returning a boolean mask; :data:`RULES` maps each code to
its rule. Limits are plain keyword options of :func:`check`, recorded in the manifest's sidecar.
"""

from __future__ import annotations

from . import codes, defaults
from .errors import ParameterError
from .probe import DEFAULT_MAX_PIXELS

DEFAULT_MIN_SIDE = defaults.MIN_SIDE

# probe faults -> the code that reports them
_FAULT_CODES = {"empty": "empty-file", "not-image": "not-image", "unreadable": "unreadable",
                "truncated": "truncated", "pixel-limit": "pixel-limit", "symlink": "link-skipped"}


def _fault(code):
    faults = {f for f, c in _FAULT_CODES.items() if c == code}
    return lambda df, limits: df["fault"].isin(faults)


def _pixel_limit(df, limits):
    pixels = (df["width"].astype("Float64") * df["height"].astype("Float64")).fillna(0)
    return df["fault"].eq("pixel-limit") | (pixels > limits["max_pixels"])


def _too_small(df, limits):
    side = df[["width", "height"]].min(axis=1)
    return (side < limits["min_side"]).fillna(False)


def _no_label(df, limits):
    return df["label"].eq("") & ~df["fault"].eq("symlink")


def _wrong_extension(df, limits):
    from .formats import format_of_extension

    named = df["path"].map(format_of_extension)
    return df["format"].ne("") & named.ne("") & named.ne(df["format"])


RULES = {
    "empty-file": _fault("empty-file"),
    "not-image": _fault("not-image"),
    "unreadable": _fault("unreadable"),
    "truncated": _fault("truncated"),
    "pixel-limit": _pixel_limit,
    "link-skipped": _fault("link-skipped"),
    "too-small": _too_small,
    "no-label": _no_label,
    "wrong-extension": _wrong_extension,
}


def limits_of(*, min_side: int = DEFAULT_MIN_SIDE, max_pixels: int = DEFAULT_MAX_PIXELS) -> dict:
    """The validated limits :func:`check` uses, as a dict (also what goes in the sidecar)."""
    for name, value in (("min_side", min_side), ("max_pixels", max_pixels)):
        if isinstance(value, bool) or not isinstance(value, int):
            raise TypeError(f"{name} must be an int; got {type(value).__name__}")
        if value < 1:
            raise ParameterError(f"{name} must be >= 1; got {name}={value}")
    return {"min_side": min_side, "max_pixels": max_pixels}


def check(manifest, *, min_side: int = DEFAULT_MIN_SIDE, max_pixels: int = DEFAULT_MAX_PIXELS):
    """Flag every file that is unusable or risky, with one code per reason.

    Parameters
    ----------
    manifest : DataFrame
        A scanned manifest.
    min_side : int
        Shorter side below this many pixels is ``too-small`` (default 32).
    max_pixels : int
        Images over this many pixels are ``pixel-limit`` (default: Pillow's limit, 89,478,485).

    Returns
    -------
    DataFrame
        A copy with the ``issues`` column updated; no row is removed.

    Examples
    --------
    >>> m = check(scan("photos/"), min_side=64)     # doctest: +SKIP
    >>> m["issues"].str.contains("too-small").sum()  # doctest: +SKIP
    """
    limits = limits_of(min_side=min_side, max_pixels=max_pixels)
    out = manifest.copy()
    if "issues" not in out.columns:
        out["issues"] = ""
    found = {code: rule(out, limits).to_numpy(dtype=bool) for code, rule in RULES.items()}
    out["issues"] = codes.replace_stage_codes(out["issues"], "check", found)
    return out


def reason(row) -> str:
    """One line explaining a row's check codes, for listings."""
    if row.get("fault_detail"):
        return str(row["fault_detail"])
    w, h = row.get("width"), row.get("height")
    return f"{row.get('format') or 'unknown format'}, {w}x{h}" if w is not None else str(row.get("format"))


def summary_lines(manifest, *, examples: int = 3) -> list[str]:
    """Lines for the terminal: per code its severity and count, then the first few files and why."""
    from .codes import CODES, counts

    lines = []
    tally = counts(manifest["issues"])
    if not tally:
        return ["no issues found"]
    for code, n in tally.items():
        info = CODES.get(code)
        severity = info.severity if info else "?"
        lines.append(f"{code:<16} {severity:<8} {n:>6} file{'s' if n != 1 else ''}")
        hit = manifest[manifest["issues"].str.split(";").map(lambda cs: code in cs)]
        for _, row in hit.head(examples).iterrows():
            lines.append(f"    {row['path']}: {reason(row) if info and info.stage == 'check' else info.meaning if info else ''}")
        if n > examples:
            lines.append(f"    ... and {n - examples} more")
    return lines
