"""What needs a human in a manifest, in the order to review it, served a page at a time.

Three lists, each of manifest row indices built once per manifest with vectorised pandas, so a
page of any of them costs the same at 100,000 rows as at 100: ``clusters`` (every near-duplicate
cluster, most urgent first, as :func:`labelprep.reports.cluster_table` ranks them), ``conflicts``
(the clusters whose labels disagree), ``files`` (every row carrying an issue code other than the
copy codes the clusters show, and rows whose features suggest another label, errors first).
"""

from __future__ import annotations

from .. import codes

TABS = ("clusters", "conflicts", "files")
COPY_CODES = ("exact-copy", "near-copy", "label-conflict")  # shown by the clusters themselves
MAX_PAGE = 200
_BOX = {"phash": "whole image", "phash_c80": "centre 80%", "phash_c70": "centre 70%",
        "phash_mirror": "mirrored"}


class Queue:
    """The review lists of one manifest (rows indexed by position, as the manifest file holds them)."""

    def __init__(self, manifest, *, flips: bool = False):
        import numpy as np
        import pandas as pd

        from ..reports import _complete, cluster_table

        m = manifest.reset_index(drop=True)
        self.m = m
        self.flips = flips  # mirrored hashes count as evidence only when group matched them
        self.paths = m["path"].astype(str).to_numpy(dtype=object)
        self.index = pd.Index(self.paths)
        done = _complete(m.assign(_row=np.arange(len(m))))
        table = cluster_table(done)
        self.cluster_ids = table.index.to_numpy(dtype=np.int64)
        self.cluster_facts = table
        members = done[done["dup_group"].notna()].assign(
            _other=lambda d: ~d["keeper"].fillna(False).astype(bool))
        members = members.sort_values(["dup_group", "_other", "path"], kind="stable")
        self.members = {int(g): rows.to_numpy(dtype=np.int64)
                        for g, rows in members.groupby("dup_group", sort=False)["_row"]}
        self.conflict_ids = self.cluster_ids[table["conflict"].to_numpy(dtype=bool)]
        self.files = self._flagged(done)

    def _flagged(self, done):
        import numpy as np

        issues = done["issues"].to_numpy(dtype=object)
        error_codes = {c.code for c in codes.CODES.values() if c.severity == codes.ERROR}
        rank = np.full(len(done), 3, dtype=np.int64)  # 3: nothing to review
        for i in np.flatnonzero(issues != ""):
            found = [c for c in codes.parse(issues[i]) if c not in COPY_CODES]
            if found:
                rank[i] = 0 if any(c in error_codes for c in found) else 2
        if "likely_label" in done.columns:  # the learned-feature stage's suggestion, when it ran
            rank[(done["likely_label"].fillna("").astype(str) != "").to_numpy() & (rank > 1)] = 1
        if "muted" in done.columns:  # a kept file stays listed: its warnings were only muted
            rank[(done["muted"].fillna("").astype(str) != "").to_numpy() & (rank > 2)] = 2
        chosen = np.flatnonzero(rank < 3)
        order = np.lexsort((chosen, rank[chosen]))  # done is in path order: position is path order
        return done["_row"].to_numpy(dtype=np.int64)[chosen[order]]

    def counts(self) -> dict:
        return {"clusters": len(self.cluster_ids), "conflicts": len(self.conflict_ids),
                "files": len(self.files), "rows": len(self.m)}

    def page(self, tab: str, offset: int, limit: int, decisions) -> dict:
        """Items ``offset`` to ``offset + limit`` of ``tab``, with each row's current decisions."""
        ids = {"clusters": self.cluster_ids, "conflicts": self.conflict_ids, "files": self.files}[tab]
        chosen = ids[offset:offset + limit]
        by_path = _decisions_by_path(decisions)
        if tab == "files":
            items = [{"kind": "file", "members": [self.member(int(r), None, by_path)]} for r in chosen]
        else:
            items = [self.cluster(int(g), by_path) for g in chosen]
        return {"tab": tab, "total": len(ids), "offset": offset, "items": items}

    def cluster(self, gid: int, by_path: dict) -> dict:
        rows = self.members[gid]
        facts = self.cluster_facts.loc[gid]
        return {"kind": "cluster", "id": gid, "size": int(facts["size"]),
                "conflict": bool(facts["conflict"]), "leak": bool(facts["leak"]),
                "members": [self.member(int(r), int(rows[0]), by_path) for r in rows]}

    def evidence(self, keeper: int, row: int) -> list:
        """Why ``row`` sits with the kept file: byte-identical, or the closest of their
        perceptual hashes (whole image, centred boxes, mirrored) with its distance in bits."""
        from ..hashing import HASH_COLUMNS, MIRROR_COLUMN
        from ..reports.page import hamming

        if row == keeper:
            return []
        if self.cell("sha256", row) and self.cell("sha256", row) == self.cell("sha256", keeper):
            return [{"hash": "sha256", "bits": 0, "what": "byte-identical"}]
        found = []
        for mine in (*HASH_COLUMNS, *((MIRROR_COLUMN,) if self.flips else ())):
            for theirs in HASH_COLUMNS:
                bits = hamming(self.cell(mine, row), self.cell(theirs, keeper))
                if bits is not None:
                    found.append({"hash": f"{mine}/{theirs}", "bits": bits,
                                  "what": f"{_BOX[mine]} against {_BOX[theirs]}"})
        return sorted(found, key=lambda e: e["bits"])[:2]

    def member(self, row: int, keeper_row, by_path: dict) -> dict:
        from ..reports.page import hamming

        path = self.paths[row]
        keeper_hash = self.cell("phash", keeper_row) if keeper_row is not None else None
        facts = {name: self.cell(name, row) for name in
                 ("label", "split", "issues", "decided", "muted", "label_original", "likely_label",
                  "fault", "format")}
        facts["keeper_cell"] = self.cell("keeper", row)
        facts["keeper"] = facts.pop("keeper_cell") == "True"
        facts["distance"] = hamming(keeper_hash, self.cell("phash", row)) if keeper_hash is not None else None
        facts["evidence"] = self.evidence(keeper_row, row) if keeper_row is not None else []
        kind = self.cell("link_kind", row)  # the group stage's pixel verification, when it ran
        facts["link"] = {"kind": kind, "to": self.cell("linked_to", row),
                         "likeness": self.cell("link_likeness", row),
                         "blemish": self.cell("link_blemish", row)} if kind else None
        size = [self.cell(c, row) for c in ("width", "height")]
        facts["size"] = "x".join(size) if all(size) else ""
        return {"row": row, "path": path, **facts, "decisions": by_path.get(path, [])}

    def cell(self, column: str, row: int) -> str:
        import pandas as pd

        if column not in self.m.columns:
            return ""
        value = self.m[column].iat[row]
        return "" if pd.isna(value) else str(value)

    def row_of(self, path: str) -> int:
        k = self.index.get_indexer([path])[0]
        return int(k)


def _decisions_by_path(decisions) -> dict:
    """``{path: [decision, ...]}``: every decision naming the path (as path or as pair value)."""
    from ..decisions import PAIR_ACTIONS

    found: dict[str, list] = {}
    for path, action, value, note in zip(decisions["path"], decisions["action"], decisions["value"],
                                         decisions["note"]):
        entry = {"path": path, "action": action, "value": value, "note": note}
        found.setdefault(path, []).append(entry)
        if action in PAIR_ACTIONS:
            found.setdefault(value, []).append(entry)
    return found
