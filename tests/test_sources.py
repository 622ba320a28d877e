"""Archives read in place and several sources in one run (labelprep.sources)."""

from __future__ import annotations

import hashlib
import io
import os
import stat
import tarfile
import zipfile

import pytest

from _tally import tally
from conftest import encode, textured
from labelprep import defaults, sources
from labelprep.cli import main
from labelprep.errors import InputError, ParameterError
from labelprep.exports import export
from labelprep.manifest import read, read_sidecar
from labelprep.pipeline import prepare
from labelprep.probe import probe
from labelprep.reports import report, terminal_table
from labelprep.reports.page import thumbnail
from labelprep.scanner import scan


def _jpeg(seed: int, size=(96, 64)) -> bytes:
    return encode(textured(size, seed=seed), "JPEG", quality=90)


def _snapshot(root) -> dict:
    """Every entry below ``root`` with its bytes and stat facts: a scan must change none."""
    out = {}
    for folder, dirs, files in os.walk(root):
        for name in dirs + files:
            path = os.path.join(folder, name)
            st = os.lstat(path)
            data = open(path, "rb").read() if stat.S_ISREG(st.st_mode) else b""
            out[path] = (st.st_mode, st.st_size, st.st_mtime_ns, hashlib.sha256(data).hexdigest())
    return out


def _zip(path, members: dict, *, compression=zipfile.ZIP_DEFLATED):
    path.parent.mkdir(parents=True, exist_ok=True)
    with zipfile.ZipFile(path, "w", compression=compression) as zf:
        for name, data in members.items():
            zf.writestr(name, data)
    return path


def _tar(path, members: dict, mode="w"):
    path.parent.mkdir(parents=True, exist_ok=True)
    with tarfile.open(path, mode) as tf:
        for name, data in members.items():
            info = tarfile.TarInfo(name)
            info.size = len(data)
            tf.addfile(info, io.BytesIO(data))
    return path


def _by_path(m) -> dict:
    return {row["path"]: row for _, row in m.iterrows()}


class TestArchives:
    @pytest.mark.parametrize("name,writer", [("more.zip", _zip), ("more.tar", _tar),
                                             ("more.tar.gz", lambda p, m: _tar(p, m, "w:gz")),
                                             ("more.tgz", lambda p, m: _tar(p, m, "w:gz"))])
    def test_members_are_rows_like_files(self, tmp_path, name, writer):
        """Path = archive path + member path; label from the folders around and inside; the same
        size, digest and hashes as the member's bytes probed as a file."""
        root = tmp_path / "root"
        rocket, moon = _jpeg(1), _jpeg(2, (80, 120))
        writer(root / "things" / name, {"rocket.jpg": rocket, "sky/moon.jpg": moon})
        (root / "loose").mkdir()
        (root / "loose" / "moon.jpg").write_bytes(moon)
        before = _snapshot(root)
        m = scan(root, jobs=1)
        after = _snapshot(root)
        tally(files=len(m), lost=sum(before.get(k) != after.get(k) for k in before.keys() | after.keys()))
        assert after == before  # nothing extracted, nothing touched
        rows = _by_path(m)
        member = rows[f"things/{name}/rocket.jpg"]
        alone = probe(_write(tmp_path / "alone.jpg", rocket))
        for column in ("bytes", "sha256", "width", "height", "format", "phash", "phash_c80", "spread"):
            assert member[column] == alone[column], column
        assert member["label"] == "things" and member["fault"] == ""
        assert rows[f"things/{name}/sky/moon.jpg"]["label"] == "things"
        assert rows[f"things/{name}/sky/moon.jpg"]["sha256"] == rows["loose/moon.jpg"]["sha256"]

    def test_an_archive_given_as_the_root(self, tmp_path):
        archive = _zip(tmp_path / "data.zip", {"train/cat/a.jpg": _jpeg(1), "test/dog/b.jpg": _jpeg(2)})
        m, facts = scan(archive, jobs=1, return_facts=True)
        assert list(m["path"]) == ["test/dog/b.jpg", "train/cat/a.jpg"]
        assert list(m["label"]) == ["dog", "cat"] and list(m["given_split"]) == ["test", "train"]
        assert facts["layout"] == "split-folders"

    def test_split_folders_inside_an_archive_below_the_root(self, tmp_path):
        _zip(tmp_path / "root" / "data.zip", {"train/cat/a.jpg": _jpeg(1), "val/dog/b.jpg": _jpeg(2)})
        m, facts = scan(tmp_path / "root", jobs=1, return_facts=True)
        assert list(m["path"]) == ["data.zip/train/cat/a.jpg", "data.zip/val/dog/b.jpg"]
        assert list(m["label"]) == ["cat", "dog"] and list(m["given_split"]) == ["train", "val"]

    def test_a_label_table_names_members_by_their_manifest_path(self, tmp_path):
        root = tmp_path / "root"
        _zip(root / "more.zip", {"a.jpg": _jpeg(1)})
        table = tmp_path / "labels.csv"
        table.write_text("path,label\nmore.zip/a.jpg,rocket\n", encoding="utf-8")
        m = scan(root, labels=table, jobs=1)
        assert m.loc[0, "label"] == "rocket"

    def test_hidden_and_system_members_are_skipped_and_counted(self, tmp_path):
        _zip(tmp_path / "root" / "a.zip", {"cat/x.jpg": _jpeg(1), "__MACOSX/cat/._x.jpg": b"junk",
                                           "cat/.DS_Store": b"junk"})
        m, facts = scan(tmp_path / "root", jobs=1, return_facts=True)
        assert list(m["path"]) == ["a.zip/cat/x.jpg"] and facts["skipped_junk"] == 2

    def test_an_unreadable_archive_is_one_row_with_the_reason(self, tmp_path):
        (tmp_path / "root").mkdir()
        (tmp_path / "root" / "fake.zip").write_bytes(b"this is no zip")
        cut = _tar(tmp_path / "root" / "cut.tgz", {"a.jpg": _jpeg(1)}, "w:gz")
        cut.write_bytes(cut.read_bytes()[:40])
        rows = _by_path(scan(tmp_path / "root", jobs=1))
        assert "not a readable zip archive" in rows["fake.zip"]["fault_detail"]
        assert "not a readable tar archive" in rows["cut.tgz"]["fault_detail"]
        assert {r["fault"] for r in rows.values()} == {"unsafe-member"}
        tally(faults=2)


def _write(path, data: bytes):
    path.write_bytes(data)
    return path


def _zip_link(path):
    """A zip entry that is a symbolic link (APPNOTE.TXT 4.4.15: Unix mode in the upper 16 bits)."""
    with zipfile.ZipFile(path, "w") as zf:
        zf.writestr("ok.jpg", _jpeg(1))
        info = zipfile.ZipInfo("link.jpg")
        info.external_attr = (stat.S_IFLNK | 0o777) << 16
        zf.writestr(info, "/etc/passwd")
    return "link.jpg", "a link or special file"


def _tar_special(path, kind):
    with tarfile.open(path, "w") as tf:
        data = _jpeg(1)
        info = tarfile.TarInfo("ok.jpg")
        info.size = len(data)
        tf.addfile(info, io.BytesIO(data))
        special = tarfile.TarInfo("odd.jpg")
        special.type = kind
        special.linkname = "/etc/passwd" if kind in (tarfile.SYMTYPE, tarfile.LNKTYPE) else ""
        tf.addfile(special)
    return "odd.jpg", "link" if kind in (tarfile.SYMTYPE, tarfile.LNKTYPE) else "special entry"


def _named(path, name, expected_path, reason):
    def make():
        if str(path).endswith(".zip"):
            with zipfile.ZipFile(path, "w") as zf:
                zf.writestr("ok.jpg", _jpeg(1))
                zf.writestr(zipfile.ZipInfo(name), _jpeg(2))
        else:
            _tar(path, {"ok.jpg": _jpeg(1), name: _jpeg(2)})
        return expected_path, reason
    return make


class TestHostileArchives:
    """Each hostile kind is refused per member with a reason; the other members are read; nothing
    is written anywhere."""

    @pytest.mark.parametrize("build", [
        lambda p: _named(p.with_suffix(".zip"), "../../evil.jpg", "%2e%2e/%2e%2e/evil.jpg", "climbing out")(),
        lambda p: _named(p.with_suffix(".tar"), "../evil.jpg", "%2e%2e/evil.jpg", "climbing out")(),
        lambda p: _named(p.with_suffix(".zip"), "/etc/evil.jpg", "etc/evil.jpg", "absolute member name")(),
        lambda p: _named(p.with_suffix(".tar"), "/evil.jpg", "evil.jpg", "absolute member name")(),
        lambda p: _named(p.with_suffix(".zip"), "C:\\evil.jpg", "C:/evil.jpg", "absolute member name")(),
        lambda p: _zip_link(p.with_suffix(".zip")),
        lambda p: _tar_special(p.with_suffix(".tar"), tarfile.SYMTYPE),
        lambda p: _tar_special(p.with_suffix(".tar"), tarfile.LNKTYPE),
        lambda p: _tar_special(p.with_suffix(".tar"), tarfile.CHRTYPE),
        lambda p: _tar_special(p.with_suffix(".tar"), tarfile.FIFOTYPE),
    ], ids=["zip-dotdot", "tar-dotdot", "zip-absolute", "tar-absolute", "zip-drive", "zip-symlink",
            "tar-symlink", "tar-hardlink", "tar-device", "tar-fifo"])
    def test_names_and_links(self, tmp_path, build):
        root = tmp_path / "root"
        root.mkdir()
        expected, reason = build(root / "bad")
        archive = next(root.iterdir()).name
        before = _snapshot(tmp_path)
        rows = _by_path(scan(root, jobs=1))
        after = _snapshot(tmp_path)
        tally(refused=1, lost=sum(before.get(k) != after.get(k) for k in before.keys() | after.keys()))
        assert after == before
        refused = rows[f"{archive}/{expected}"]
        assert refused["fault"] == "unsafe-member" and reason in refused["fault_detail"]
        assert rows[f"{archive}/ok.jpg"]["fault"] == ""
        assert not any(".." in p.split("/") for p in rows)

    def test_a_declared_size_over_the_budget(self, tmp_path, monkeypatch):
        monkeypatch.setattr(defaults, "MEMBER_BYTES", 10_000)
        root = tmp_path / "root"
        _zip(root / "a.zip", {"big.png": encode(textured((300, 300), seed=1), "PNG"), "ok.jpg": _jpeg(1)},
             compression=zipfile.ZIP_STORED)
        _tar(root / "b.tar", {"big.png": encode(textured((300, 300), seed=1), "PNG")})
        rows = _by_path(scan(root, jobs=1))
        for path in ("a.zip/big.png", "b.tar/big.png"):
            assert "over the 10,000-byte budget per member" in rows[path]["fault_detail"]
        assert rows["a.zip/ok.jpg"]["fault"] == ""
        tally(refused=2)

    def test_a_zip_compression_bomb(self, tmp_path):
        """8 MiB of zeros deflate about 1000:1: over the ratio (common practice) and the grace."""
        root = tmp_path / "root"
        _zip(root / "bomb.zip", {"flat.bmp": bytes(8 * 2**20), "small.bmp": bytes(2**19), "ok.jpg": _jpeg(1)})
        rows = _by_path(scan(root, jobs=1))
        assert "ratio of a compression bomb" in rows["bomb.zip/flat.bmp"]["fault_detail"]
        assert rows["bomb.zip/small.bmp"]["fault"] == "not-image"  # under the grace: read, not refused
        tally(refused=1)

    def test_a_gzip_tar_bomb_stops_the_listing_without_decompressing_it(self, tmp_path, monkeypatch):
        """The stream bound: listing stops at the member whose data ends past MAX_RATIO x the
        archive's size; that member is refused and the archive says where it stopped."""
        monkeypatch.setattr(defaults, "RATIO_GRACE", 0)
        root = tmp_path / "root"
        _tar(root / "bomb.tgz", {"a.jpg": _jpeg(1), "zeros.bmp": bytes(16 * 2**20), "after.jpg": _jpeg(2)}, "w:gz")
        rows = _by_path(scan(root, jobs=1))
        assert rows["bomb.tgz/a.jpg"]["fault"] == ""
        assert "expands past 100x" in rows["bomb.tgz/zeros.bmp"]["fault_detail"]
        assert "listing stopped at member 'zeros.bmp'" in rows["bomb.tgz"]["fault_detail"]
        assert "bomb.tgz/after.jpg" not in rows
        tally(refused=1)

    def test_a_name_listed_twice(self, tmp_path):
        root = tmp_path / "root"
        root.mkdir()
        with zipfile.ZipFile(root / "twice.zip", "w") as zf:
            with pytest.warns(UserWarning, match="Duplicate name"):
                zf.writestr("a.jpg", _jpeg(1))
                zf.writestr("a.jpg", _jpeg(2))
        rows = _by_path(scan(root, jobs=1))
        assert list(rows) == ["twice.zip/a.jpg"] and "listed twice" in rows["twice.zip/a.jpg"]["fault_detail"]
        tally(refused=1)


class TestArchiveRescanAndExport:
    def test_a_rescan_reuses_members_until_the_archive_changes(self, runner, tmp_path):
        root = tmp_path / "root"
        archive = _zip(root / "cat" / "more.zip", {"a.jpg": _jpeg(1), "b.jpg": _jpeg(2)})
        out = tmp_path / "m.csv"
        first = runner.invoke(main, ["scan", str(root), "-o", str(out), "-j", "1"])
        again = runner.invoke(main, ["scan", str(root), "-o", str(out), "-j", "1"])
        assert "(2 decoded, 0 unchanged)" in first.output and "(0 decoded, 2 unchanged)" in again.output
        st = archive.stat()
        os.utime(archive, ns=(st.st_atime_ns, st.st_mtime_ns + 10**9))
        moved = runner.invoke(main, ["scan", str(root), "-o", str(out), "-j", "1"])
        assert "(2 decoded, 0 unchanged)" in moved.output, moved.output

    def test_export_copies_members_out_and_the_report_shows_them(self, runner, tmp_path):
        root = tmp_path / "root"
        members = {f"{label}/{k}.jpg": _jpeg(10 * i + k) for i, label in enumerate(("cat", "dog")) for k in range(5)}
        _zip(root / "set.zip", members)
        out = tmp_path / "out"
        assert runner.invoke(main, ["prepare", str(root), "--out", str(out), "-j", "1", "-q"]).exit_code == 0
        result = runner.invoke(main, ["export", str(out / "manifest.csv"), str(tmp_path / "exp"), "-q"])
        assert result.exit_code == 0, result.output
        m = read(out / "manifest.csv")
        placed = m[m["split"] != ""]
        assert len(placed) == 10
        for _, row in placed.iterrows():
            name = row["path"].rsplit("/", 1)[1]
            exported = tmp_path / "exp" / row["split"] / row["label"] / name
            assert exported.read_bytes() == members[row["path"].split("/", 1)[1]]
        assert thumbnail(root, "set.zip/cat/0.jpg").startswith("data:image/jpeg;base64,")
        table = export(m, tmp_path / "exp2", root=root, mode="hardlink")
        assert set(table["method"]) == {"copy"}  # a member has no file of its own to link to
        tally(files=10)

    def test_locate_refuses_paths_that_leave(self, tmp_path):
        with pytest.raises(InputError, match="leaves the scanned folder"):
            sources.locate(tmp_path, "a/../../x.jpg")
        with pytest.raises(InputError, match="names no source"):
            sources.locate({"a": tmp_path}, "b/x.jpg")


def _two_sources(tmp_path, write_image):
    """old/<label>/... (class folders) and new/<train|val|test>/<label>/... (split folders); the
    same photo sits in both, under the same label."""
    old, new = tmp_path / "old", tmp_path / "new"
    for k in range(6):
        write_image(old / "cat" / f"c{k}.jpg", seed=k)
        write_image(old / "dog" / f"d{k}.jpg", seed=20 + k)
    for k in range(3):
        write_image(new / "train" / "cat" / f"n{k}.jpg", seed=40 + k)
        write_image(new / "test" / "dog" / f"m{k}.jpg", seed=60 + k)
    (new / "train" / "cat" / "again.jpg").write_bytes((old / "cat" / "c0.jpg").read_bytes())
    return old, new


class TestSeveralSources:
    def test_each_root_has_its_own_layout_and_paths_say_the_source(self, tmp_path, write_image):
        old, new = _two_sources(tmp_path, write_image)
        m, facts = scan([old, new], jobs=1, return_facts=True)
        assert set(m["source"]) == {"old", "new"}
        assert all(p.startswith(s + "/") for p, s in zip(m["path"], m["source"]))
        rows = _by_path(m)
        assert rows["old/cat/c1.jpg"]["label"] == "cat" and rows["old/cat/c1.jpg"]["given_split"] == ""
        assert rows["new/train/cat/n1.jpg"]["label"] == "cat"
        assert rows["new/train/cat/n1.jpg"]["given_split"] == "train"
        assert facts["layout"] == {"old": "folders", "new": "split-folders"}
        assert m["path"].is_unique and list(m["path"]) == sorted(m["path"])

    def test_one_root_has_no_source_column(self, class_tree):
        assert "source" not in scan(class_tree, jobs=1).columns

    def test_names_are_made_unique_and_a_root_twice_is_refused(self, tmp_path):
        for folder in ("a/photos", "b/photos", "c/photos"):
            (tmp_path / folder).mkdir(parents=True)
        named = sources.name_roots([tmp_path / "a/photos", tmp_path / "b/photos", tmp_path / "c/photos"])
        assert [n for n, _ in named] == ["photos", "photos-2", "photos-3"]
        with pytest.raises(ParameterError, match="is given twice"):
            sources.name_roots([tmp_path / "a/photos", tmp_path / "a/../a/photos"])
        with pytest.raises(InputError, match="neither a folder nor"):
            sources.name_roots([tmp_path / "a/photos", tmp_path / "nothing"])

    def test_a_label_table_per_source(self, tmp_path, write_image):
        old, new = _two_sources(tmp_path, write_image)
        table = tmp_path / "new-labels.csv"
        table.write_text("path,label,group\ntrain/cat/n0.jpg,lynx,s1\n", encoding="utf-8")
        m = scan([old, new], labels=[f"new={table}"], jobs=1)
        rows = _by_path(m)
        assert rows["new/train/cat/n0.jpg"]["label"] == "lynx" and rows["new/train/cat/n0.jpg"]["group"] == "s1"
        assert rows["new/train/cat/n1.jpg"]["label"] == ""  # a table lists every file it labels
        assert rows["old/cat/c1.jpg"]["label"] == "cat"
        by_root = scan([old, new], labels={str(new): table}, jobs=1)
        assert by_root["label"].tolist() == m["label"].tolist()
        with pytest.raises(ParameterError, match="SOURCE=TABLE, SOURCE one of old, new"):
            scan([old, new], labels=str(table), jobs=1)

    def test_an_archive_as_one_of_several_roots(self, tmp_path, write_image):
        old, _ = _two_sources(tmp_path, write_image)
        archive = _zip(tmp_path / "more.zip", {"owl/a.jpg": _jpeg(1)})
        table = tmp_path / "t.csv"
        table.write_text("path,label\nowl/a.jpg,barn owl\n", encoding="utf-8")
        m = scan([old, archive], labels=[f"{tmp_path / 'more.zip'}/={table}"], jobs=1)
        rows = _by_path(m)
        assert rows["more.zip/owl/a.jpg"]["source"] == "more.zip"
        assert rows["more.zip/owl/a.jpg"]["label"] == "barn owl" and rows["more.zip/owl/a.jpg"]["fault"] == ""
        roots = sources.roots_of(sources.describe(sources.name_roots([old, archive])))
        assert sources.read_bytes(roots, "more.zip/owl/a.jpg") == _jpeg(1)

    def test_group_by_source(self, tmp_path, write_image):
        old, new = _two_sources(tmp_path, write_image)
        m = scan([old, new], group_by_source=True, jobs=1)
        assert (m["group"] == m["source"]).all()

    def test_a_copy_in_two_sources_is_one_cluster_in_one_split(self, runner, tmp_path, write_image):
        """End to end through the command line: the copy across sources is grouped and split
        together, and the report breaks classes and issues down by source."""
        old, new = _two_sources(tmp_path, write_image)
        out = tmp_path / "out"
        result = runner.invoke(main, ["prepare", str(old), str(new), "--out", str(out), "-j", "1"])
        assert result.exit_code == 0, result.output
        m = read(out / "manifest.csv")
        pair = m[m["path"].isin(["old/cat/c0.jpg", "new/train/cat/again.jpg"])]
        assert pair["dup_group"].nunique() == 1 and pair["dup_group"].notna().all()
        assert pair["split"].nunique() == 1 and pair["split"].iloc[0] != ""
        assert read_sidecar(out / "manifest.csv")["sources"] == {"old": str(old.resolve()),
                                                                 "new": str(new.resolve())}
        summary = report(m)
        by_source = {s["source"]: s for s in summary["sources"]}
        assert by_source["old"]["files"] == 12 and by_source["new"]["files"] == 7
        assert by_source["old"]["classes"] == {"cat": 6, "dog": 6}
        assert by_source["new"]["issues"]["exact-copy"] == 1
        assert "source" in terminal_table(summary) and "source-table" in (out / "report.html").read_text()
        again = runner.invoke(main, ["prepare", str(old), str(new), "--out", str(out), "-j", "1", "-q"])
        assert again.exit_code == 0 and read(out / "manifest.csv").equals(m)

    def test_scan_command_with_two_roots_and_a_table_each(self, runner, tmp_path, write_image):
        old, new = _two_sources(tmp_path, write_image)
        table = tmp_path / "t.csv"
        table.write_text("path,label\ntrain/cat/n0.jpg,lynx\n", encoding="utf-8")
        out = tmp_path / "m.csv"
        result = runner.invoke(main, ["scan", str(old), str(new), "-o", str(out), "--labels", f"new={table}", "-j", "1"])
        assert result.exit_code == 0, result.output
        assert "layout old: folders, new: table" in result.output
        bare = runner.invoke(main, ["scan", str(old), str(new), "-o", str(out), "--labels", str(table)])
        assert bare.exit_code == 2 and "SOURCE=TABLE" in bare.output

    def test_the_library_prepare_takes_a_list(self, tmp_path, write_image):
        old, new = _two_sources(tmp_path, write_image)
        m, summary = prepare([old, new], tmp_path / "out", jobs=1)
        assert {s["source"] for s in summary["sources"]} == {"old", "new"}
        assert len(m) == 19
