"""Faults injected into real runs: signals at random points, a killed worker, a full disk, an
unwritable output. None leaves a half-written manifest or a temporary file, none prints a
traceback, and the rerun resumes to the byte-identical result."""

from __future__ import annotations

import errno
import os
import random
import resource
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
from _tally import tally
from conftest import assert_handled, encode, textured

from labelprep import manifest
from labelprep.cli import main
from labelprep.errors import LabelprepError
from labelprep.parallel import map_ordered

FILES = 80
# fixed, so that a failure is reproduced by running the test again
RNG_SEED = 8


@pytest.fixture(scope="module")
def tree(tmp_path_factory):
    root = tmp_path_factory.mktemp("faults") / "photos"
    for k in range(FILES):
        path = root / f"c{k % 4}" / f"{k:03d}.png"
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_bytes(encode(textured((128, 96), k), "PNG"))
    return root


@pytest.fixture(scope="module")
def reference(tree, tmp_path_factory):
    """The manifest bytes of an undisturbed scan, and how long that scan took."""
    out = tmp_path_factory.mktemp("reference") / "m.csv"
    started = time.monotonic()
    run = _scan(tree, out)
    assert run.returncode == 0, run.stderr
    return out.read_bytes(), time.monotonic() - started


def _scan(root, out, *extra, preexec_fn=None):
    return subprocess.run([sys.executable, "-m", "labelprep", "scan", str(root), "-o", str(out),
                           "--jobs", "2", "-q", *extra], capture_output=True, text=True,
                          preexec_fn=preexec_fn, timeout=300)


def _start_scan(root, out):
    # a session of its own, so that every process the scan started can be found afterwards
    return subprocess.Popen([sys.executable, "-m", "labelprep", "scan", str(root), "-o", str(out),
                             "--jobs", "2", "-q"], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True, start_new_session=True)


def _children(pid: int) -> list:
    try:
        return [int(p) for p in Path(f"/proc/{pid}/task/{pid}/children").read_text().split()]
    except OSError:
        return []


def _assert_session_ended(proc) -> None:
    """No process of the scan's session outlives it (orphaned workers would hold the journal)."""
    deadline = time.monotonic() + 10
    while time.monotonic() < deadline:
        try:
            os.killpg(proc.pid, 0)
        except ProcessLookupError:
            return
        time.sleep(0.1)
    os.killpg(proc.pid, signal.SIGKILL)  # only the processes this test started
    pytest.fail("worker processes outlived the interrupted scan")


def _leftovers(folder: Path) -> list:
    return sorted(p.name for p in folder.iterdir() if p.name.endswith((".tmp", ".part")))


def _assert_clean_stop(out: Path, stderr: str) -> None:
    assert "Traceback" not in stderr, stderr
    assert len(stderr.strip().splitlines()) <= 1, stderr
    assert _leftovers(out.parent) == []
    # the manifest is absent or whole: a reader never sees half of one
    if out.exists():
        manifest.read(out)


@pytest.mark.parametrize("how, to_group", [("SIGINT", False), ("SIGTERM", False),
                                           ("SIGINT", True), ("SIGTERM", True)])
def test_signal_at_a_random_point_then_resume(tree, reference, tmp_path, how, to_group, request):
    """A signal to the scan alone (kill PID) or to all its processes (Ctrl-C in a terminal)."""
    expected, seconds = reference
    rng = random.Random(f"{RNG_SEED}-{request.node.name}")
    out = tmp_path / "m.csv"
    proc = _start_scan(tree, out)
    time.sleep(rng.uniform(0.2, 1.2) * seconds)  # anywhere from start-up to the last file
    if to_group:
        os.killpg(proc.pid, getattr(signal, how))
    else:
        proc.send_signal(getattr(signal, how))
    _, stderr = proc.communicate(timeout=60)
    _assert_session_ended(proc)
    _assert_clean_stop(out, stderr)
    signum = getattr(signal, how)
    # finished first (0), killed before the handler was set (-signum), or stopped by it: the
    # shell's 128 + signum (130 for Ctrl-C, 143 for kill) with the line saying a rerun resumes
    assert proc.returncode in (0, -signum, 128 + signum), (proc.returncode, stderr)
    if proc.returncode == 128 + signum:
        assert "run the same command again to resume" in stderr, stderr
    rerun = _scan(tree, out)
    assert rerun.returncode == 0, rerun.stderr
    tally(faults=1, lost=int(out.read_bytes() != expected))
    assert out.read_bytes() == expected
    assert not Path(str(out) + ".scan-journal").exists()


def test_killed_worker_is_one_line_then_resume(tree, reference, tmp_path):
    expected, _ = reference
    out = tmp_path / "m.csv"
    proc = _start_scan(tree, out)
    deadline = time.monotonic() + 60
    while not _children(proc.pid) and time.monotonic() < deadline:
        time.sleep(0.02)
    workers = _children(proc.pid)
    if not workers:
        proc.wait(timeout=60)
        pytest.fail("the scan started no worker process")
    time.sleep(0.05)  # soon enough that the scan is still running on a quiet machine
    try:
        os.kill(workers[-1], signal.SIGKILL)  # as the kernel's out-of-memory killer would
    except ProcessLookupError:
        pass  # the pool had already finished and retired it: the scan must still end whole
    _, stderr = proc.communicate(timeout=60)
    _assert_session_ended(proc)
    if proc.returncode != 0:  # else the worker was already done: nothing was lost either
        assert proc.returncode == 2 and "worker" in stderr, stderr
    _assert_clean_stop(out, stderr)
    rerun = _scan(tree, out)
    assert rerun.returncode == 0, rerun.stderr
    tally(faults=1, lost=int(out.read_bytes() != expected))
    assert out.read_bytes() == expected


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="parent-death signal is Linux's prctl")
def test_workers_end_when_the_scan_is_killed(tree, tmp_path):
    """SIGKILL to the scan alone (the out-of-memory killer's choice): its workers must not live
    on, waiting for work from a parent that is gone."""
    proc = _start_scan(tree, tmp_path / "m.csv")
    deadline = time.monotonic() + 60
    while len(_children(proc.pid)) < 2 and time.monotonic() < deadline:
        time.sleep(0.02)
    workers = _children(proc.pid)
    proc.kill()
    proc.wait(timeout=60)  # not communicate(): live workers would hold its pipes open
    if not workers:
        pytest.fail("the scan started no worker process")
    tally(faults=1)
    _assert_session_ended(proc)
    proc.communicate(timeout=60)


def _die(item):
    if item == 5:
        os.kill(os.getpid(), signal.SIGKILL)
    return item


def test_map_ordered_names_a_dead_worker():
    with pytest.raises(LabelprepError, match="worker process"):
        list(map_ordered(_die, range(40), jobs=2, chunksize=2))
    tally(faults=1)


def _small_files(limit_bytes: int):
    def limit():
        resource.setrlimit(resource.RLIMIT_FSIZE, (limit_bytes, limit_bytes))
    return limit


def test_full_disk_keeps_the_previous_manifest(tree, tmp_path):
    """A real write failure: the file-size limit makes every write past 4 KiB fail (EFBIG)."""
    out = tmp_path / "m.csv"
    first = _scan(tree, out)
    assert first.returncode == 0, first.stderr
    before = {p.name: p.read_bytes() for p in tmp_path.iterdir()}
    os.utime(next(tree.rglob("*.png")))  # one changed file, so the manifest must be rewritten
    try:
        run = _scan(tree, out, preexec_fn=_small_files(4096))
    finally:
        os.utime(next(tree.rglob("*.png")))
    tally(faults=1)
    assert run.returncode == 2, run.stderr
    assert "Traceback" not in run.stderr and len(run.stderr.strip().splitlines()) == 1, run.stderr
    assert "too large" in run.stderr.lower() or "no space" in run.stderr.lower()
    after = {p.name: p.read_bytes() for p in tmp_path.iterdir() if not p.name.endswith(".scan-journal")}
    assert after == before  # manifest, sidecar and cache exactly as they were; no temp file


def test_full_disk_on_a_first_scan_then_resume(tree, reference, tmp_path):
    """The journal is the first file to outgrow the limit: one line, no manifest, then a resume."""
    out = tmp_path / "m.csv"
    run = _scan(tree, out, preexec_fn=_small_files(4096))
    tally(faults=1)
    assert run.returncode == 2 and "scan journal" in run.stderr, run.stderr
    _assert_clean_stop(out, run.stderr)
    assert not out.exists()
    assert _scan(tree, out).returncode == 0
    assert out.read_bytes() == reference[0]


@pytest.mark.parametrize("target", ["manifest", "sidecar", "cache"])
def test_no_space_at_any_write_keeps_the_manifest_whole(runner, tree, tmp_path, monkeypatch, target):
    out = tmp_path / "m.csv"
    assert runner.invoke(main, ["scan", str(tree), "-o", str(out), "-q"]).exit_code == 0
    old = out.read_bytes()
    names = {"manifest": out.name, "sidecar": manifest.sidecar_path(out).name,
             "cache": manifest.cache_path(out).name}
    real_replace = os.replace

    def full(src, dst):
        if Path(dst).name == names[target]:
            raise OSError(errno.ENOSPC, "No space left on device")
        return real_replace(src, dst)

    monkeypatch.setattr(os, "replace", full)
    _rescan_fails_with(runner, tree, out, "No space left on device")
    assert _leftovers(tmp_path) == []
    assert manifest.to_csv_bytes(manifest.read(out)) == out.read_bytes()
    if target == "manifest":
        assert out.read_bytes() == old


def test_unwritable_output_folder(runner, tree, tmp_path, monkeypatch):
    """As root every folder is writable; refuse the temporary file as a read-only folder would."""
    out = tmp_path / "m.csv"
    assert runner.invoke(main, ["scan", str(tree), "-o", str(out), "-q"]).exit_code == 0
    old = out.read_bytes()

    def refuse(*args, **kwargs):
        raise PermissionError(errno.EACCES, "Permission denied")

    monkeypatch.setattr(manifest, "_fresh_file", refuse)
    _rescan_fails_with(runner, tree, out, "Permission denied")
    assert out.read_bytes() == old


def _rescan_fails_with(runner, tree, out, message: str) -> None:
    """A rescan after one file changed (so the manifest must be rewritten) ends in one line."""
    os.utime(next(tree.rglob("*.png")))
    result = runner.invoke(main, ["scan", str(tree), "-o", str(out), "-q"])
    tally(faults=1)
    assert_handled(result, 2)
    assert message in result.output


def test_output_in_a_missing_folder(runner, tree, tmp_path):
    result = runner.invoke(main, ["scan", str(tree), "-o", str(tmp_path / "no" / "m.csv"), "-q"])
    assert_handled(result, 2)
    assert "No such file or directory" in result.output


def test_disk_full_during_export_leaves_no_partial_file(runner, tree, tmp_path, monkeypatch):
    import shutil

    assert runner.invoke(main, ["prepare", str(tree), "--out", str(tmp_path / "out"), "-q"]).exit_code == 0
    real_copystat, calls = shutil.copystat, []

    def full_after_three(src, dst, **kwargs):  # the fourth copy finds the disk full
        calls.append(dst)
        if len(calls) == 4:
            raise OSError(errno.ENOSPC, "No space left on device")
        return real_copystat(src, dst, **kwargs)

    monkeypatch.setattr(shutil, "copystat", full_after_three)
    dest = tmp_path / "dest"
    result = runner.invoke(main, ["export", str(tmp_path / "out" / "manifest.csv"), str(dest),
                                  "--mode", "copy", "-q"])
    tally(faults=1)
    assert_handled(result, 2)
    assert "No space left on device" in result.output
    assert [p for p in dest.rglob("*") if p.name.endswith(".part")] == []
    placed = [p for p in dest.rglob("*") if p.is_file()]
    assert len(placed) == 3  # the files finished before the fault, each whole
    for p in placed:
        assert p.read_bytes() == (tree / p.parent.name / p.name).read_bytes()
