"""``prepare``: scan -> check -> group -> split -> report, in one call, into one output folder."""

from __future__ import annotations

from pathlib import Path

from . import options as spec
from .decisions import digest_of, findings
from .errors import InputError

MANIFEST_NAME = "manifest.csv"
REPORT_JSON = "report.json"
REPORT_HTML = "report.html"


def prepare(root, out, *, force=False, progress=None, decisions=None, **options):
    """Run every stage on ``root`` and write ``out/manifest.csv``, ``report.json``, ``report.html``.

    ``root`` is a folder, an archive or a list of them (several sources, see
    :mod:`labelprep.sources`). A manifest already in ``out`` from an earlier run is used as the rescan cache: unchanged files
    are not decoded again. ``options`` are those of :func:`~labelprep.scan`, :func:`~labelprep.check`,
    :func:`labelprep.embedding.features_for`, :func:`~labelprep.group`, :func:`~labelprep.vet` and
    :func:`~labelprep.split`, as listed in :data:`labelprep.options.SPEC`
    (an option left out takes its default; one that is not there raises ``TypeError``);
    ``keep_from`` is a manifest path or DataFrame whose split is kept. A tree laid out as
    ``ROOT/<train|val|test>/<label>/`` keeps its given split (each file stays in its folder's
    split, files outside them are placed) unless ``resplit`` or ``keep_from``. ``cluster`` (a
    Dask scheduler address) decodes the files on that cluster's workers, as in
    :func:`~labelprep.scan`. Nothing in ``out`` is indexed, nor a label table stored inside a
    root. The sidecar records every option that shapes the result
    (:func:`labelprep.options.record`) and what the scan did (``stages.prepare.scan``: what it
    left out and skipped, empty folders). ``decisions`` is a decisions file
    (:mod:`labelprep.decisions`); by default ``out/decisions.csv`` when it exists. Its digest is
    recorded in the sidecar.

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
    from .reports import report
    from .scanner import resuming, scan
    from .sources import describe, name_roots, roots_of

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
    decided = load_decisions(out, decisions)

    with resuming(target, root=root, max_pixels=chosen["max_pixels"]) as (previous, journal):
        m, scan_facts = scan(root, previous=previous, journal=journal, progress=progress, return_facts=True,
                             exclude=[out], **spec.for_stage("scan", chosen))
        m = check(m, **spec.for_stage("check", chosen))
        learned = _learned(m, roots_of(where), target, chosen, progress)
        m = group_and_split(m, decided, group_options={"progress": progress, **spec.for_stage("group", chosen)},
                            scene_links=learned["scene_links"],
                            split_options={"progress": progress, **spec.for_stage("split", chosen),
                                           "keep_from": keep_from},
                            vet_options={"embeddings": learned["embeddings"], **spec.for_stage("vet", chosen)})
        meta = {**where, **spec.sidecar("prepare", spec.record(chosen, *spec.STAGES), scan=scan_facts,
                                        decisions=digest_of(decided), features=learned["facts"],
                                        vet=m.attrs.get("vet", {}))}
        manifest.write(m, target, meta=meta, force=True, new_sidecar=True)
    summary = report(m, json=out / REPORT_JSON, html=out / REPORT_HTML, root=roots_of(where),
                     meta=manifest.read_sidecar(target), force=force,
                     decisions={**digest_of(decided), **findings(m, decided)}, review=out)
    return m, summary


def load_decisions(folder, decisions=None):
    """The decisions table a run in ``folder`` honours: the file ``decisions`` (which must
    exist), else ``folder/decisions.csv`` when it exists (else no decision)."""
    from .decisions import FILE_NAME, load

    if decisions is not None:
        return load(decisions)
    return load(Path(folder) / FILE_NAME, required=False)


def group_and_split(m, decisions, *, group_options: dict, split_options: dict, vet_options=None,
                    scene_links=None):
    """The group, vet (when ``vet_options`` are given) and split stages with ``decisions``
    honoured: row decisions before each stage (a relabel changes conflicts and strata) and after
    it (a keep mutes the codes it found), pair decisions inside group. ``scene_links``
    (:func:`labelprep.scenes.scene_links`) join the clusters as extra verified links.
    ``attrs["vet"]`` of the result holds the vet's facts."""
    from .clusters import group
    from .decisions import apply
    from .labelcheck import vet
    from .splits import split

    if scene_links is None:
        m = apply(group(apply(m, decisions), decisions=decisions, **group_options), decisions)
    else:
        from .scenes import as_links, mark

        m = apply(m, decisions)
        m = apply(mark(group(m, decisions=decisions, links=as_links(m, scene_links), **group_options),
                       scene_links), decisions)
    facts = None
    if vet_options is not None:
        m = vet(m, **vet_options)
        facts = m.attrs["vet"]
        m = apply(m, decisions)
    m = apply(split(m, **split_options), decisions)
    if facts is not None:
        m.attrs["vet"] = facts
    return m


def _learned(m, root, manifest_path, chosen, progress):
    """The learned features when they are asked or installed (computed once, cached beside the
    manifest) and the same-scene links they propose and the keypoints confirm:
    ``{"embeddings", "scene_links", "facts"}`` (None, None and ``{"features": "sketch"}`` without)."""
    from .embedding import cache_path, features_for

    vectors, facts = features_for(m, root, cache=cache_path(manifest_path), progress=progress,
                                  **spec.for_stage("features", chosen))
    links = None
    if vectors is not None:
        from .scenes import scene_links

        links = scene_links(m, root, vectors, flips=chosen["flips"], jobs=chosen["jobs"],
                            cluster=chosen["cluster"], seed=chosen["seed"], progress=progress)
    return {"embeddings": vectors, "scene_links": links, "facts": facts}


def rerun(out, *, decisions=None, progress=None):
    """Group, split and report the manifest of a ``prepare`` folder ``out`` again, with the
    options its sidecar records and the decisions file as it is now; no file is decoded again.

    The review page calls this after decisions change. Returns what :func:`prepare` returns.
    """
    from . import manifest
    from .reports import report
    from .sources import roots_of

    out = Path(out)
    target = out / MANIFEST_NAME
    meta = manifest.read_sidecar(target)
    recorded = meta.get("stages", {}).get("prepare", {}).get("options")
    if recorded is None:
        raise InputError(f"{target} was not written by prepare (its sidecar records no prepare options)")
    chosen = load_decisions(out, decisions)
    split_options = spec.for_stage("split", recorded)
    keep_from = split_options.pop("keep_from", None)
    if isinstance(keep_from, str) and Path(keep_from).is_file():  # as prepare had it
        split_options["keep_from"] = manifest.read(keep_from)
    m = manifest.read(target)
    # the same learned features as the run that wrote it (the embeddings come from its cache)
    known = {o.name for o in spec.of(*spec.STAGES)}
    learned = _learned(m, roots_of(meta), target,
                       spec.resolve({k: v for k, v in recorded.items() if k in known}, *spec.STAGES), progress)
    m = group_and_split(m, chosen,
                        group_options={"progress": progress, **spec.for_stage("group", recorded)},
                        scene_links=learned["scene_links"],
                        split_options={"progress": progress, **split_options},
                        vet_options={"embeddings": learned["embeddings"], **spec.for_stage("vet", recorded)})
    prepare_stage = {**meta["stages"]["prepare"], "decisions": digest_of(chosen)}
    manifest.write(m, target, meta={"stages": {"prepare": prepare_stage}}, force=True)
    summary = report(m, json=out / REPORT_JSON, html=out / REPORT_HTML, root=roots_of(meta),
                     meta=manifest.read_sidecar(target), force=True,
                     decisions={**digest_of(chosen), **findings(m, chosen)}, review=out)
    return m, summary
