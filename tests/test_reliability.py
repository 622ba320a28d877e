"""Hostile trees and label tables: sources never change, every odd file becomes a row with a reason,
bad input is one line naming the row, names round-trip exactly, runs are byte-identical, and outputs
labelprep did not write are never replaced without --force."""

from __future__ import annotations

import csv
import hashlib
import io
import os
import shutil
import stat
import subprocess
import sys
import tempfile
import unicodedata
from pathlib import Path

import pytest
from _tally import tally
from conftest import encode, textured

from labelprep import codes, manifest
from labelprep.checks import check
from labelprep.cli import main
from labelprep.scanner import scan

NFC = unicodedata.normalize("NFC", "caf\u00e9.png")
NFD = unicodedata.normalize("NFD", NFC)
# names that break naive CSV writers, shells and path handling; bytes, so one can be non-UTF-8
HOSTILE_NAMES = [b"with space.png", b"q\"uote's.png", b"c,omma.png", b"new\nline.png",
                 b"tab\there.png", b"semi;colon.png", b"back\\slash.png", NFC.encode(), NFD.encode(),
                 b"bad\xff\xfe.png"]


def snapshot(root) -> dict:
    """Every entry below ``root`` (links not followed): content digest or link target, mode, mtime, size."""
    out = {}
    root = os.fsencode(root)
    for folder, dirs, files in os.walk(root):
        for name in dirs + files:
            full = os.path.join(folder, name)
            st = os.lstat(full)
            if stat.S_ISLNK(st.st_mode):
                content = os.readlink(full)
            elif stat.S_ISREG(st.st_mode):
                with open(full, "rb") as fh:
                    content = hashlib.sha256(fh.read()).hexdigest()
            else:
                content = None
            out[os.path.relpath(full, root)] = (content, st.st_mode, st.st_mtime_ns, st.st_size)
    return out


def _png(seed: int) -> bytes:
    return encode(textured((64, 48), seed), "PNG")


@pytest.fixture
def hostile_tree(tmp_path):
    """A class folder of hostile names, odd files, link loops and links leaving the root."""
    root = tmp_path / "hostile"
    outside = tmp_path / "outside"
    outside.mkdir()
    (outside / "secret.png").write_bytes(_png(99))
    cls = os.fsencode(root / "cls a")
    os.makedirs(cls)
    for seed, name in enumerate(HOSTILE_NAMES):
        with open(os.path.join(cls, name), "wb") as fh:
            fh.write(_png(seed))
    (root / "cls a" / "empty.png").write_bytes(b"")
    (root / "cls a" / "notes.png").write_bytes(b"not an image at all\n")
    (root / "cls a" / "cut.png").write_bytes(_png(50)[:300])
    os.makedirs(os.path.join(os.fsencode(root), b"folder\xe9"))  # a Latin-1 folder name
    (root / "cls b").mkdir()
    (root / "cls b" / "fine.png").write_bytes(_png(60))
    os.symlink("..", root / "cls b" / "loop")
    os.symlink(outside / "secret.png", root / "cls b" / "escape-absolute.png")
    os.symlink("../../outside/secret.png", root / "cls b" / "escape-relative.png")
    os.symlink("missing.png", root / "cls b" / "dangling.png")
    return root


def _expected_paths(root) -> set:
    """The manifest paths of a tree by an independent walk: links and non-UTF-8 names (\\x-escaped)
    are rows of their own, never entered."""
    paths = set()
    root = os.fsencode(root)
    for folder, dirs, files in os.walk(root):
        for name in list(dirs):
            try:
                name.decode("utf-8")
                entered = not os.path.islink(os.path.join(folder, name))
            except UnicodeDecodeError:
                entered = False
            if not entered:
                dirs.remove(name)
                files.append(name)
        for name in files:
            rel = os.path.relpath(os.path.join(folder, name), root)
            paths.add(rel.decode("utf-8", errors="backslashreplace"))
    return paths


def _run(runner, *args):
    result = runner.invoke(main, [str(a) for a in args])
    escaped = result.exception if not isinstance(result.exception, SystemExit) else None
    assert escaped is None, f"{type(escaped).__name__}: {escaped}"
    return result


class TestSourcesUntouched:
    @pytest.mark.parametrize("tree", ["demo_tree", "hostile_tree"])
    def test_prepare_and_every_export_mode_change_nothing(self, request, runner, tmp_path, tree):
        root = request.getfixturevalue(tree)
        outside = snapshot(tmp_path / "outside") if (tmp_path / "outside").is_dir() else {}
        before = snapshot(root)
        out = tmp_path / "out"
        assert _run(runner, "prepare", root, "--out", out, "--jobs", "2", "-q").exit_code == 0
        for mode in ("copy", "hardlink", "symlink"):
            result = _run(runner, "export", out / "manifest.csv", tmp_path / mode, "--mode", mode, "-q")
            assert result.exit_code == 0, result.output
        stripped = _run(runner, "export", out / "manifest.csv", tmp_path / "stripped", "--mode", "copy",
                        "--strip-metadata", "-q")
        assert stripped.exit_code == 0, stripped.output
        after = snapshot(root)
        changed = sum(before.get(k) != after.get(k) for k in before.keys() | after.keys())
        tally(files=len(before), lost=changed)
        assert after == before
        if outside:
            assert snapshot(tmp_path / "outside") == outside


class _RacingProbe:
    """The probe, after doing what another program does between walk and read. At module level,
    so that it pickles: a scan probes in a worker process even with one job."""

    def __init__(self, gone, changed, new_bytes):
        self.gone, self.changed, self.new_bytes = gone, changed, new_bytes

    def __call__(self, path, **kwargs):
        from labelprep.probe import probe

        if path == self.gone:
            os.unlink(path)
        elif path == str(self.changed):
            self.changed.write_bytes(self.new_bytes)
        return probe(path, **kwargs)


class TestHostileTree:
    @pytest.mark.parametrize("ext", ["csv", "parquet"])
    def test_every_name_round_trips_exactly(self, runner, hostile_tree, tmp_path, ext):
        out = tmp_path / f"m.{ext}"
        result = _run(runner, "scan", hostile_tree, "-o", out, "--jobs", "2", "-q")
        assert result.exit_code == 0, result.output
        m = manifest.read(out)
        assert set(m["path"]) == _expected_paths(hostile_tree)
        assert {NFC, NFD} <= {p.split("/")[-1] for p in m["path"]}  # twins stay two rows
        for row in m[m["fault"].eq("")].itertuples():
            # the path leads back to the very file: its bytes hash to the recorded digest
            assert hashlib.sha256((hostile_tree / row.path).read_bytes()).hexdigest() == row.sha256
        tally(files=len(m))

    def test_csv_quoting_reads_back_with_the_standard_csv_module(self, runner, hostile_tree, tmp_path):
        out = tmp_path / "m.csv"
        _run(runner, "scan", hostile_tree, "-o", out, "--jobs", "1", "-q")
        # RFC 4180 quoting, read by Python's csv module rather than by pandas
        rows = list(csv.DictReader(io.StringIO(out.read_bytes().decode("utf-8"), newline="")))
        assert [r["path"] for r in rows] == manifest.read(out)["path"].tolist()
        assert "cls a/new\nline.png" in {r["path"] for r in rows}

    def test_csv_and_parquet_hold_the_same_manifest(self, runner, hostile_tree, tmp_path):
        for ext in ("csv", "parquet"):
            _run(runner, "scan", hostile_tree, "-o", tmp_path / f"m.{ext}", "--jobs", "1", "-q")
        a, b = (manifest.read(tmp_path / f"m.{ext}") for ext in ("csv", "parquet"))
        assert manifest.to_csv_bytes(a) == manifest.to_csv_bytes(b)

    def test_odd_entries_are_error_rows_with_a_reason(self, hostile_tree):
        m = check(scan(hostile_tree, jobs=1)).set_index("path")
        want = {"cls a/bad\\xff\\xfe.png": "undecodable-name", "folder\\xe9": "undecodable-name",
                "cls b/loop": "link-skipped", "cls b/escape-absolute.png": "link-skipped",
                "cls b/escape-relative.png": "link-skipped", "cls b/dangling.png": "link-skipped",
                "cls a/empty.png": "empty-file", "cls a/notes.png": "not-image", "cls a/cut.png": "truncated"}
        for path, code in want.items():
            assert code in codes.parse(m.loc[path, "issues"]), path
            assert codes.CODES[code].severity == codes.ERROR
            assert m.loc[path, "fault_detail"]
        assert "../../outside/secret.png" in m.loc["cls b/escape-relative.png", "fault_detail"]

    def test_links_are_not_followed(self, hostile_tree, tmp_path):
        m = scan(hostile_tree, jobs=1)
        secret = hashlib.sha256((tmp_path / "outside" / "secret.png").read_bytes()).hexdigest()
        assert secret not in set(m["sha256"])  # the file outside the root was never read
        assert not any(p.startswith("cls b/loop/") for p in m["path"])  # the loop was not entered
        links = m[m["fault"].eq("symlink")]
        assert len(links) == 4 and links["sha256"].eq("").all()

    def test_prepare_keeps_error_rows_out_of_the_split(self, runner, hostile_tree, tmp_path):
        result = _run(runner, "prepare", hostile_tree, "--out", tmp_path / "out", "--jobs", "1", "-q")
        assert result.exit_code == 0, result.output
        m = manifest.read(tmp_path / "out" / "manifest.csv")
        assert m.loc[codes.errors_mask(m["issues"]), "split"].eq("").all()

    def test_unreadable_file_and_folder_are_rows(self, hostile_tree, monkeypatch):
        """Permission denied, simulated in this process (the tests run as root, who may read all)."""
        import builtins

        denied_file = str(hostile_tree / "cls b" / "fine.png")
        denied_dir = str(hostile_tree / "cls a")
        real_open, real_scandir, real_listdir = builtins.open, os.scandir, os.listdir

        def refuse(path, real):
            # the scan's worker process (forked, so patched too) opens pipes by descriptor
            if not isinstance(path, int) and os.fspath(path) in (denied_file, denied_dir):
                raise PermissionError(13, "Permission denied", os.fspath(path))
            return real(path)

        monkeypatch.setattr(builtins, "open", lambda p, *a, **k: refuse(p, lambda q: real_open(q, *a, **k)))
        monkeypatch.setattr(os, "scandir", lambda p=".": refuse(p, real_scandir))
        monkeypatch.setattr(os, "listdir", lambda p=".": refuse(p, real_listdir))
        m = check(scan(hostile_tree, jobs=1)).set_index("path")
        tally(faults=2)
        for path in ("cls b/fine.png", "cls a"):
            assert m.loc[path, "fault"] == "unreadable"
            assert m.loc[path, "fault_detail"] == "Permission denied"
            assert "unreadable" in codes.parse(m.loc[path, "issues"])

    def test_file_vanishing_or_changing_mid_scan(self, hostile_tree, monkeypatch):
        import labelprep.scanner as scanner_mod

        gone = str(hostile_tree / "cls a" / "with space.png")
        changed = hostile_tree / "cls a" / "c,omma.png"
        new_bytes = _png(77)
        monkeypatch.setattr(scanner_mod, "probe", _RacingProbe(gone, changed, new_bytes))
        m = check(scan(hostile_tree, jobs=1)).set_index("path")
        tally(faults=2)
        assert m.loc["cls a/with space.png", "fault_detail"] == "No such file or directory"
        assert "unreadable" in codes.parse(m.loc["cls a/with space.png", "issues"])
        # the row describes the bytes that were read, so digest and size agree with each other
        assert m.loc["cls a/c,omma.png", "sha256"] == hashlib.sha256(new_bytes).hexdigest()
        assert m.loc["cls a/c,omma.png", "bytes"] == len(new_bytes)

    def test_a_ten_thousand_entry_folder(self, tmp_path):
        root = tmp_path / "wide" / "cls"
        root.mkdir(parents=True)
        for i in range(10_000):
            (root / f"{i:05d}.png").write_bytes(_png(i) if i % 1000 == 0 else b"x%d" % i)
        m = scan(tmp_path / "wide", jobs=1)
        tally(files=len(m))
        assert len(m) == 10_000
        assert m["path"].tolist() == sorted(m["path"])
        assert m["fault"].eq("").sum() == 10 and m["fault"].eq("not-image").sum() == 9_990
        manifest.write(m, tmp_path / "wide.csv")
        assert manifest.to_csv_bytes(manifest.read(tmp_path / "wide.csv")) == manifest.to_csv_bytes(m)


def _nobody_can_run_labelprep() -> bool:
    probe = subprocess.run(["setpriv", "--reuid=nobody", "--regid=nogroup", "--clear-groups",
                            sys.executable, "-c", "import labelprep.scanner"],
                           capture_output=True, cwd=tempfile.gettempdir())
    return probe.returncode == 0


@pytest.mark.skipif(os.geteuid() != 0 or shutil.which("setpriv") is None,
                    reason="needs root and setpriv to run the scan as an unprivileged user")
def test_real_permission_denied_as_an_unprivileged_user(tmp_path):
    """Real EACCES: the scan runs as nobody on a tree with a mode-000 file and folder."""
    if not _nobody_can_run_labelprep():
        pytest.skip("the user nobody cannot import labelprep from this installation")
    base = Path(tempfile.mkdtemp(dir=tempfile.gettempdir()))
    try:
        base.chmod(0o777)
        root = base / "tree"
        (root / "cls" / "locked").mkdir(parents=True)
        (root / "cls" / "ok.png").write_bytes(_png(1))
        (root / "cls" / "secret.png").write_bytes(_png(2))
        (root / "cls" / "locked" / "inner.png").write_bytes(_png(3))
        for p in (root, root / "cls", root / "cls" / "ok.png"):
            p.chmod(0o755 if p.is_dir() else 0o644)
        (root / "cls" / "secret.png").chmod(0)
        (root / "cls" / "locked").chmod(0)
        out = base / "m.csv"
        run = subprocess.run(["setpriv", "--reuid=nobody", "--regid=nogroup", "--clear-groups",
                              sys.executable, "-m", "labelprep", "scan", str(root), "-o", str(out),
                              "--jobs", "1", "-q"], capture_output=True, text=True, cwd=base)
        assert run.returncode == 0 and "Traceback" not in run.stderr, run.stderr
        m = manifest.read(out).set_index("path")
        tally(faults=2)
        assert m.loc["cls/secret.png", "fault_detail"] == "Permission denied"
        assert m.loc["cls/locked", "fault_detail"] == "Permission denied"
        assert m.loc["cls/ok.png", "fault"] == ""
    finally:
        for folder, dirs, _ in os.walk(base):
            for d in dirs:
                os.chmod(os.path.join(folder, d), 0o755)
        shutil.rmtree(base)


BAD_TABLES = [
    (b"path,label\n../up.png,cat\n", "line 2"),
    (b"path,label\n/etc/passwd,cat\n", "line 2"),
    (b"path,label\ncls/a.png,cat\ncls/a.png,dog\n", "line 3"),
    (b"path,label\ncls/nowhere.png,cat\n", "line 2"),
    (b"path,label,colour\ncls/a.png,cat,red\n", "line 1"),
    (b"path,label\ncls/a.png,chat\ncls/b.png,f\xe9e\n", "line 3"),   # Latin-1, not UTF-8
    ("path,label\ncls/a.png,cat\n".encode("utf-16"), "line 1"),       # UTF-16 with its BOM
]


class TestHostileLabelTables:
    @pytest.fixture
    def small_tree(self, tmp_path):
        root = tmp_path / "small"
        (root / "cls").mkdir(parents=True)
        (root / "cls" / "a.png").write_bytes(_png(1))
        (root / "cls" / "b.png").write_bytes(_png(2))
        return root

    @pytest.mark.parametrize("table, where", BAD_TABLES)
    @pytest.mark.parametrize("command", ["scan", "prepare"])
    def test_one_line_naming_the_row_and_nothing_written(self, runner, small_tree, tmp_path,
                                                         table, where, command):
        labels = tmp_path / "labels.csv"
        labels.write_bytes(table)
        out = tmp_path / "out"
        out.mkdir()
        target = ["-o", out / "m.csv"] if command == "scan" else ["--out", out]
        before = snapshot(small_tree)
        result = _run(runner, command, small_tree, "--labels", labels, *target, "--jobs", "1", "-q")
        assert result.exit_code == 2
        message = result.output.strip()
        assert "\n" not in message and where in message and "labels.csv" in message, message
        assert list(out.iterdir()) == []  # no manifest, no journal, no temporary file
        assert snapshot(small_tree) == before
        tally(faults=1)


class TestDeterminism:
    @pytest.fixture
    def tree(self, class_tree):
        for seed, name in enumerate(["cat/with space.jpg", "dog/c,omma.jpg", "eel/new\nline.jpg"]):
            (class_tree / name).write_bytes(encode(textured((96, 64), 40 + seed)))
        return class_tree

    def test_jobs_and_reruns_give_identical_bytes(self, runner, tree, tmp_path):
        outputs = []
        for k, jobs in enumerate([1, 2, 1, 2]):
            out = tmp_path / f"m{k}.csv"
            _run(runner, "scan", tree, "-o", out, "--jobs", jobs, "-q")
            outputs.append(out.read_bytes())
        assert len(set(outputs)) == 1

    def test_a_copy_without_times_gives_the_same_manifest(self, runner, tree, tmp_path):
        copy = tmp_path / "elsewhere" / "copied"
        shutil.copytree(tree, copy, copy_function=shutil.copyfile)  # like cp -r: new mtimes
        assert os.stat(copy / "cat" / "g0_cat_0.jpg").st_mtime_ns != os.stat(tree / "cat" / "g0_cat_0.jpg").st_mtime_ns
        for root, out in ((tree, tmp_path / "a"), (copy, tmp_path / "b")):
            _run(runner, "prepare", root, "--out", out, "--jobs", "2", "--seed", "3", "-q")
        assert (tmp_path / "a" / "manifest.csv").read_bytes() == (tmp_path / "b" / "manifest.csv").read_bytes()

    def test_rescan_still_skips_unchanged_files(self, runner, tree, tmp_path):
        """The modification times left the manifest for its scan cache, and still do their job."""
        out = tmp_path / "m.csv"
        _run(runner, "scan", tree, "-o", out, "--jobs", "1", "-q")
        assert "mtime_ns" not in out.read_text(encoding="utf-8").splitlines()[0].split(",")
        assert manifest.cache_path(out).is_file()
        again = _run(runner, "scan", tree, "-o", out, "--jobs", "1")
        assert f"(0 decoded, {len(manifest.read(out))} unchanged)" in again.output


class TestOutputsNotOverwritten:
    def test_scan_refuses_a_foreign_file_unless_forced(self, runner, class_tree, tmp_path):
        foreign = tmp_path / "notes.csv"
        foreign.write_bytes(b"name,phone\nann,555\n")
        result = _run(runner, "scan", class_tree, "-o", foreign, "-q")
        assert result.exit_code == 2 and "--force" in result.output
        assert foreign.read_bytes() == b"name,phone\nann,555\n"
        assert _run(runner, "scan", class_tree, "-o", foreign, "--force", "-q").exit_code == 0
        assert foreign.read_bytes().startswith(b"path,")

    def test_prepare_refuses_foreign_reports(self, runner, class_tree, tmp_path):
        out = tmp_path / "out"
        out.mkdir()
        (out / "report.html").write_text("<p>my own page</p>")
        result = _run(runner, "prepare", class_tree, "--out", out, "-q")
        assert result.exit_code == 2 and "--force" in result.output
        assert (out / "report.html").read_text() == "<p>my own page</p>"
        assert not (out / "manifest.csv").exists()

    def test_report_refuses_a_foreign_file(self, runner, class_tree, tmp_path):
        out = tmp_path / "m.csv"
        _run(runner, "scan", class_tree, "-o", out, "-q")
        page = tmp_path / "page.html"
        page.write_text("<p>keep me</p>")
        result = _run(runner, "report", out, "--html", page, "-q")
        assert result.exit_code == 2
        assert page.read_text() == "<p>keep me</p>"

    def test_export_refuses_a_non_empty_folder(self, runner, class_tree, tmp_path):
        _run(runner, "prepare", class_tree, "--out", tmp_path / "out", "-q")
        dest = tmp_path / "dest"
        dest.mkdir()
        (dest / "mine.txt").write_text("keep")
        result = _run(runner, "export", tmp_path / "out" / "manifest.csv", dest, "-q")
        assert result.exit_code == 2 and "--force" in result.output
        assert [p.name for p in dest.iterdir()] == ["mine.txt"]
        assert _run(runner, "export", tmp_path / "out" / "manifest.csv", dest, "--force", "-q").exit_code == 0
        assert (dest / "mine.txt").read_text() == "keep"  # force replaces only what an export writes


def _phone_photo(fmt: str, seed: int) -> bytes:
    """A photo as a phone saves it (HEIC through pillow-heif, AVIF through Pillow), turned a
    quarter by its EXIF orientation."""
    pytest.importorskip("pillow_heif").register_heif_opener()
    exif = __import__("PIL.Image", fromlist=["Exif"]).Exif()
    exif[0x0112] = 6  # TIFF 6.0 / EXIF Orientation: rotate 90 degrees clockwise to view
    return encode(textured((80, 64), seed), fmt, exif=exif.tobytes())


@pytest.fixture
def inputs_tree(tmp_path):
    """Two sources as people have them: phone photos, archives holding every hostile member kind
    next to fine ones and hostile names, and a label table from a spreadsheet set to ';'."""
    import tarfile
    import zipfile

    phone, share = tmp_path / "phone", tmp_path / "share"
    (phone / "cat").mkdir(parents=True)
    (phone / "cat" / "IMG_0001.HEIC").write_bytes(_phone_photo("HEIF", 1))
    (phone / "cat" / "IMG_0002.avif").write_bytes(_phone_photo("AVIF", 2))
    (phone / "cat" / "copy.png").write_bytes(_png(3))
    with zipfile.ZipFile(phone / "downloads.zip", "w", zipfile.ZIP_DEFLATED) as zf:
        for k, name in enumerate(["dog/a.png", "dog/q\"uote's.png", "dog/new\nline.png", "dog/c,omma.png"]):
            zf.writestr(name, _png(10 + k))
        zf.writestr("../escape.png", _png(20))
        zf.writestr("/etc/absolute.png", _png(21))
        zf.writestr("dog/bomb.bmp", bytes(4 * 2**20))
        link = zipfile.ZipInfo("dog/link.png")
        link.external_attr = (stat.S_IFLNK | 0o777) << 16
        zf.writestr(link, "/etc/passwd")
    (share / "owl").mkdir(parents=True)
    with tarfile.open(share / "owl" / "pack.tgz", "w:gz") as tf:
        for name, data in [("o1.png", _png(30)), ("o2.png", _png(31)), ("same.png", _png(3))]:
            info = tarfile.TarInfo(name)
            info.size = len(data)
            tf.addfile(info, io.BytesIO(data))
        for kind, name in [(tarfile.SYMTYPE, "sym.png"), (tarfile.LNKTYPE, "hard.png"), (tarfile.CHRTYPE, "dev")]:
            special = tarfile.TarInfo(name)
            special.type, special.linkname = kind, "/etc/passwd" if kind != tarfile.CHRTYPE else ""
            tf.addfile(special)
    table = tmp_path / "share-labels.csv"
    buffer = io.StringIO(newline="")
    writer = csv.writer(buffer, delimiter=";")  # csv.excel: \r\n line ends
    writer.writerows([("path", "label"), ("owl\\pack.tgz\\o1.png", "owl, barn"), ("owl/pack.tgz/o2.png", "owl"),
                      ("owl/pack.tgz/same.png", "cat")])
    table.write_bytes(b"\xef\xbb\xbf" + buffer.getvalue().encode("utf-8"))
    return phone, share, table


class TestInputsAsPeopleHaveThem:
    REFUSED = 7  # ../, absolute, bomb, zip link; tar symlink, hardlink, device

    def test_two_sources_with_archives_change_nothing_and_every_refusal_says_why(self, runner, tmp_path,
                                                                                   inputs_tree):
        phone, share, table = inputs_tree
        before = {root: snapshot(root) for root in (phone, share)}
        out = tmp_path / "out"
        result = _run(runner, "prepare", phone, share, "--out", out, "--labels", f"share={table}", "-j", "2", "-q")
        assert result.exit_code == 0, result.output
        for mode in ("copy", "hardlink", "symlink"):
            assert _run(runner, "export", out / "manifest.csv", tmp_path / mode, "--mode", mode, "-q").exit_code == 0
        after = {root: snapshot(root) for root in before}
        changed = sum(before[r].get(k) != after[r].get(k) for r in before for k in before[r].keys() | after[r].keys())
        m = manifest.read(out / "manifest.csv")
        refused = m[m["fault"] == "unsafe-member"]
        tally(files=len(m), refused=len(refused), lost=changed)
        assert changed == 0
        assert len(refused) == self.REFUSED and (refused["fault_detail"] != "").all()
        assert not any(".." in p.split("/") or p.startswith("/") for p in m["path"])
        rows = {r["path"]: r for _, r in m.iterrows()}
        heic = rows["phone/cat/IMG_0001.HEIC"]
        assert (heic["format"], heic["width"], heic["height"], heic["fault"]) == ("heif", 64, 80, "")
        assert rows["phone/cat/IMG_0002.avif"]["width"] == 64
        assert rows["share/owl/pack.tgz/o1.png"]["label"] == "owl, barn"
        assert rows["phone/downloads.zip/dog/new\nline.png"]["label"] == "dog"
        # the PNG in the phone folder and its copy in the colleague's tar: one cluster, one split
        pair = m[m["path"].isin(["phone/cat/copy.png", "share/owl/pack.tgz/same.png"])]
        assert pair["dup_group"].nunique() == 1 and pair["split"].nunique() == 1
        placed = m[m["split"] != ""]
        copies = [p for p in (tmp_path / "copy").rglob("*") if p.is_file() and p.parent != tmp_path / "copy"]
        assert len(copies) == len(placed) > 0
        assert manifest.read(out / "manifest.csv").equals(m)  # the CSV round trip is exact
