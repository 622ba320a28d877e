"""``prepare``: scan -> check -> group -> split -> report, in one call, into one output folder."""

from __future__ import annotations

from pathlib import Path

from . import options as spec
from .errors import InputError

MANIFEST_NAME = "manifest.csv"
REPORT_JSON = "report.json"
REPORT_HTML = "report.html"


def prepare(root, out, *, force=False, progress=None, **options):
    """Run every stage on ``root`` and write ``out/manifest.csv``, ``report.json``, ``report.html``.

    ``root`` is a folder, an archive or a list of them (several sources, see
    :mod:`labelprep.sources`). A manifest already in ``out`` from an earlier run is used as the rescan cache: unchanged files
    are not decoded again. ``options`` are those of :func:`~labelprep.scan`, :func:`~labelprep.check`,
    :func:`~labelprep.group` and :func:`~labelprep.split`, as listed in :data:`labelprep.options.SPEC`
    (an option left out takes its default; one that is not there raises ``TypeError``);
    ``keep_from`` is a manifest path or DataFrame whose split is kept. A tree laid out as
    ``ROOT/<train|val|test>/<label>/`` keeps its given split (each file stays in its folder's
    split, files outside them are placed) unless ``resplit`` or ``keep_from``. ``cluster`` (a
    Dask scheduler address) decodes the files on that cluster's workers, as in
    :func:`~labelprep.scan`. Nothing in ``out`` is indexed, nor a label table stored inside a
    root. The sidecar records every option that shapes the result
    (:func:`labelprep.options.record`) and what the scan did (``stages.prepare.scan``: what it
    left out and skipped, empty folders).

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
    from .scanner import resuming, scan
    from .sources import describe, name_roots, roots_of
    from .splits import split

    chosen = spec.resolve(options, *spec.STAGES)
    out = Path(out)
    where = describe(name_roots(root))
    if out.exists() and not out.is_dir():
        raise InputError(f"--out {out} exists and is not a folder")
    out.mkdir(parents=True, exist_ok=True)
    target = out / MANIFEST_NAME
    for path in (target, out / REPORT_JSON, out / REPORT_HTML):  # refuse before the work, not after it
        manifest.guard_output(path, force=force)
    keep_from = chosen["keep_from"]
    if isinstance(keep_from, (str, Path)):
        keep_from = manifest.read(keep_from)

    with resuming(target, root=root, max_pixels=chosen["max_pixels"]) as (previous, journal):
        m, scan_facts = scan(root, previous=previous, journal=journal, progress=progress, return_facts=True,
                             exclude=[out], **spec.for_stage("scan", chosen))
        m = check(m, **spec.for_stage("check", chosen))
        m = group(m, progress=progress, **spec.for_stage("group", chosen))
        m = split(m, progress=progress, **{**spec.for_stage("split", chosen), "keep_from": keep_from})
        meta = {**where, **spec.sidecar("prepare", spec.record(chosen, *spec.STAGES), scan=scan_facts)}
        manifest.write(m, target, meta=meta, force=True, new_sidecar=True)
    summary = report(m, json=out / REPORT_JSON, html=out / REPORT_HTML, root=roots_of(where),
                     meta=manifest.read_sidecar(target), force=force)
    return m, summary
