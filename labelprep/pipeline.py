"""``prepare``: scan -> check -> group -> split -> report, in one call, into one output folder."""

from __future__ import annotations

from pathlib import Path

from . import defaults
from .errors import InputError

MANIFEST_NAME = "manifest.csv"
REPORT_JSON = "report.json"
REPORT_HTML = "report.html"


def prepare(root, out, *, layout="auto", labels=None, group_pattern=None, group_by_source=False,
            include_hidden=False,
            jobs=None, max_pixels=defaults.MAX_PIXELS, min_side=defaults.MIN_SIDE,
            max_aspect=defaults.MAX_ASPECT, min_spread=defaults.MIN_SPREAD,
            max_distance=defaults.MAX_DISTANCE, keep_conflicts=False, flips=True, ratios=defaults.RATIOS,
            seed=defaults.SEED, folds=None, keep_from=None, force=False, progress=None, cluster=None):
    """Run every stage on ``root`` and write ``out/manifest.csv``, ``report.json``, ``report.html``.

    ``root`` is a folder, an archive or a list of them (several sources, see
    :mod:`labelprep.sources`). A manifest already in ``out`` from an earlier run is used as the rescan cache: unchanged files
    are not decoded again. Options are those of :func:`~labelprep.scan`, :func:`~labelprep.check`,
    :func:`~labelprep.group` and :func:`~labelprep.split`; ``keep_from`` is a manifest path or
    DataFrame whose split is kept. ``cluster`` (a Dask scheduler address) decodes the files on
    that cluster's workers, as in :func:`~labelprep.scan`.

    Returns
    -------
    (DataFrame, dict)
        The final manifest and the report summary (what ``report.json`` holds).

    Examples
    --------
    >>> m, summary = prepare("photos/", "prepared/", seed=7)   # doctest: +SKIP
    >>> summary["splits"]["test"]["count"]                   # doctest: +SKIP
    """
    from . import manifest
    from .checks import check
    from .clusters import group
    from .reports import report
    from .scanner import journal_path, previous_manifest, scan
    from .sources import describe, name_roots, roots_of
    from .splits import split

    out = Path(out)
    where = describe(name_roots(root))
    if out.exists() and not out.is_dir():
        raise InputError(f"--out {out} exists and is not a folder")
    out.mkdir(parents=True, exist_ok=True)
    target = out / MANIFEST_NAME
    manifest.guard_output(target, force=force)
    for name in (REPORT_JSON, REPORT_HTML):  # refuse before the work, not after it
        manifest.guard_output(out / name, force=force, marker=b"labelprep")
    previous = previous_manifest(target, root=root, max_pixels=max_pixels)
    journal = journal_path(target)
    if isinstance(keep_from, (str, Path)):
        keep_from = manifest.read(keep_from)

    m = scan(root, layout=layout, labels=labels, group_pattern=group_pattern,
             group_by_source=group_by_source, include_hidden=include_hidden, jobs=jobs, max_pixels=max_pixels,
             previous=previous, journal=journal, progress=progress, cluster=cluster)
    scan_facts = m.attrs.get("scan", {})
    m = check(m, min_side=min_side, max_pixels=max_pixels, max_aspect=max_aspect,
              min_spread=min_spread)
    m = group(m, max_distance=max_distance, keep_conflicts=keep_conflicts, flips=flips,
              progress=progress, cluster=cluster)
    m = split(m, ratios=ratios, seed=seed, folds=folds, keep_from=keep_from, progress=progress)
    options = {"layout": layout, "labels": labels, "group_pattern": group_pattern,
               "include_hidden": include_hidden, "max_pixels": max_pixels, "min_side": min_side,
               "max_aspect": max_aspect, "min_spread": min_spread,
               "max_distance": max_distance, "keep_conflicts": keep_conflicts, "flips": flips,
               "ratios": list(ratios), "seed": seed, "folds": folds}
    if group_by_source:
        options["group_by_source"] = True
    meta = {**where, "seed": seed,
            "stages": {"prepare": {"options": options, "scan": scan_facts}}}
    manifest.write(m, target, meta=meta, force=True)
    journal.unlink(missing_ok=True)  # the manifest now holds every row the journal held
    summary = report(m, json=out / REPORT_JSON, html=out / REPORT_HTML, root=roots_of(where),
                     meta=manifest.read_sidecar(target), force=force)
    return m, summary

