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
            max_distance=defaults.MAX_DISTANCE, keep_conflicts=False, flips=False, ratios=defaults.RATIOS,
            seed=defaults.SEED, folds=None, keep_from=None, resplit=False, force=False, progress=None,
            cluster=None):
    """Run every stage on ``root`` and write ``out/manifest.csv``, ``report.json``, ``report.html``.

    ``root`` is a folder, an archive or a list of them (several sources, see
    :mod:`labelprep.sources`). A manifest already in ``out`` from an earlier run is used as the rescan cache: unchanged files
    are not decoded again. Options are those of :func:`~labelprep.scan`, :func:`~labelprep.check`,
    :func:`~labelprep.group` and :func:`~labelprep.split`; ``keep_from`` is a manifest path or
    DataFrame whose split is kept. A tree laid out as ``ROOT/<train|val|test>/<label>/`` keeps
    its given split (each file stays in its folder's split, files outside them are placed) unless
    ``resplit`` or ``keep_from``. ``cluster`` (a Dask scheduler address) decodes the files on
    that cluster's workers, as in :func:`~labelprep.scan`. Nothing in ``out`` is indexed, nor a
    label table stored inside a root. ``m.attrs`` holds ``scan`` (what the scan skipped, see
    :func:`~labelprep.scan`) and ``split``: :func:`~labelprep.split_summary` (with what was
    kept from ``keep_from`` or the given split) plus ``given``, true when the given split was kept.

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
    from .splits import given_assignment, split, split_summary

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
    keep_path = keep_from if isinstance(keep_from, (str, Path)) else None
    if keep_path is not None:
        keep_from = manifest.read(keep_path)

    m = scan(root, layout=layout, labels=labels, group_pattern=group_pattern,
             group_by_source=group_by_source, include_hidden=include_hidden, jobs=jobs, max_pixels=max_pixels,
             previous=previous, journal=journal, progress=progress, cluster=cluster, exclude=[out])
    scan_facts = m.attrs.get("scan", {})
    m = check(m, min_side=min_side, max_pixels=max_pixels, max_aspect=max_aspect,
              min_spread=min_spread)
    m = group(m, max_distance=max_distance, keep_conflicts=keep_conflicts, flips=flips,
              progress=progress, cluster=cluster)
    given = False
    if keep_from is None and not resplit:  # a train/val/test folder tree keeps its split
        keep_from = given_assignment(m)
        given = keep_from is not None
    m = split(m, ratios=ratios, seed=seed, folds=folds, keep_from=keep_from, progress=progress)
    options = {"layout": layout, "labels": labels, "group_pattern": group_pattern,
               "include_hidden": include_hidden, "max_pixels": max_pixels, "min_side": min_side,
               "max_aspect": max_aspect, "min_spread": min_spread,
               "max_distance": max_distance, "keep_conflicts": keep_conflicts, "flips": flips,
               "ratios": list(ratios), "seed": seed, "folds": folds}
    extra = {"group_by_source": group_by_source, "resplit": resplit, "kept_given": given,
             "keep_from": str(keep_path) if keep_path is not None else keep_from is not None and not given}
    options.update({name: value for name, value in extra.items() if value})
    meta = {**where, "seed": seed,
            "stages": {"prepare": {"options": options, "scan": scan_facts}}}
    manifest.write(m, target, meta=meta, force=True)
    journal.unlink(missing_ok=True)  # the manifest now holds every row the journal held
    summary = report(m, json=out / REPORT_JSON, html=out / REPORT_HTML, root=roots_of(where),
                     meta=manifest.read_sidecar(target), force=force)
    m.attrs.update(scan=scan_facts, split={**split_summary(m, keep_from=keep_from), "given": given})
    return m, summary

