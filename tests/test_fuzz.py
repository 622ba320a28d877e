"""Byte mutations of valid JPEG, PNG, GIF and WebP files fed to the probe: no crash, no hang, and
every result either a clean row or a row that the check stage marks with an error code."""

from __future__ import annotations

import functools
import hashlib
import signal
import time

import pandas as pd
import pytest
from _tally import tally
from conftest import encode, textured
from hypothesis import HealthCheck, given, settings, strategies as st
from PIL import Image

from labelprep import codes, manifest, scanner
from labelprep.checks import check
from labelprep.parallel import map_ordered
from labelprep.probe import blank_facts, probe

# every fault the probe may report; each has an error code in the check stage
FAULTS = {"", "empty", "unreadable", "not-image", "truncated", "corrupt", "pixel-limit", "timeout"}
# generous for a file of a few hundred bytes; the probe's own limit turns a spin into a row
TIME_LIMIT = 5.0


def _seeds() -> dict:
    """Small valid files, one or two per format, with the structures decoders trip on."""
    rgb = textured((48, 32), 3)
    frames = [textured((24, 16), k).convert("P") for k in range(2)]
    gif = encode(frames[0], "GIF", save_all=True, append_images=frames[1:], duration=80, loop=0)
    return {
        "jpeg": encode(rgb, "JPEG", quality=80),
        "jpeg-progressive": encode(rgb, "JPEG", progressive=True),
        "png": encode(rgb, "PNG"),
        "png-palette": encode(rgb.convert("P"), "PNG", transparency=0),
        "gif": gif,
        "webp": encode(rgb, "WEBP", quality=70),
        "webp-lossless": encode(rgb, "WEBP", lossless=True),
    }


SEEDS = _seeds()

_position = st.integers(min_value=0, max_value=1 << 16)
MUTATION = st.one_of(
    st.tuples(st.just("flip"), _position, st.integers(0, 7)),
    st.tuples(st.just("set"), _position, st.integers(0, 255)),
    st.tuples(st.just("cut"), _position),
    st.tuples(st.just("insert"), _position, st.binary(min_size=1, max_size=16)),
    st.tuples(st.just("repeat"), _position, st.integers(1, 64)),
    # header fields: width, height and lengths sit in the first bytes of every one of these formats
    st.tuples(st.just("set"), st.integers(0, 40), st.sampled_from([0, 0x7F, 0x80, 0xFF])),
)


def mutate(data: bytes, mutations) -> bytes:
    out = bytearray(data)
    for kind, pos, *arg in mutations:
        if not out:
            break
        pos %= len(out)
        if kind == "flip":
            out[pos] ^= 1 << arg[0]
        elif kind == "set":
            out[pos] = arg[0]
        elif kind == "cut":
            del out[pos:]
        elif kind == "insert":
            out[pos:pos] = arg[0]
        else:  # repeat a stretch, as a bad copy or a resumed download does
            out[pos:pos] = out[pos:pos + arg[0]]
    return bytes(out)


def _assert_valid_row(facts: dict, data: bytes) -> None:
    assert facts.keys() == blank_facts().keys()
    assert facts["fault"] in FAULTS, facts["fault"]
    assert facts["bytes"] == len(data)
    assert facts["sha256"] == hashlib.sha256(data).hexdigest()
    if facts["fault"]:
        assert isinstance(facts["fault_detail"], str) and facts["fault_detail"]
        assert "\n" not in facts["fault_detail"]
    else:
        assert facts["width"] > 0 and facts["height"] > 0 and facts["frames"] >= 1
        assert len(facts["phash"]) == 16 and int(facts["phash"], 16) >= 0


def _fuzz(tmp_path_factory, examples: int, derandomize: bool) -> None:
    folder = tmp_path_factory.mktemp("fuzz")
    rows = []

    @settings(max_examples=examples, deadline=None, derandomize=derandomize, database=None,
              suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
    @given(name=st.sampled_from(sorted(SEEDS)), mutations=st.lists(MUTATION, min_size=1, max_size=4))
    def one_case(name, mutations):
        data = mutate(SEEDS[name], mutations)
        path = folder / f"case{len(rows)}.bin"
        path.write_bytes(data)
        started = time.monotonic()
        facts = probe(path, time_limit=TIME_LIMIT)
        assert time.monotonic() - started < TIME_LIMIT + 1  # no hang
        assert signal.getitimer(signal.ITIMER_REAL) == (0.0, 0.0)  # no alarm left behind
        _assert_valid_row(facts, data)
        rows.append({"path": path.name, "label": "x", **facts})
        path.unlink()

    one_case()
    checked = check(manifest.coerce(pd.DataFrame(rows)))
    faulted = checked["fault"].ne("")
    # a file the probe could not fully read never comes out of the check without an error
    assert codes.errors_mask(checked.loc[faulted, "issues"]).all()
    tally(fuzz=len(rows))
    assert len(rows) == examples
    assert 0 < faulted.sum() < len(rows)  # the mutations reach both outcomes


def test_mutated_images_give_rows_never_crashes(tmp_path_factory):
    _fuzz(tmp_path_factory, examples=300, derandomize=True)


@pytest.mark.slow
def test_mutated_images_give_rows_never_crashes_thousands(tmp_path_factory):
    _fuzz(tmp_path_factory, examples=5000, derandomize=False)


@pytest.mark.parametrize("name", sorted(SEEDS))
def test_every_seed_is_a_clean_row(tmp_path, name):
    path = tmp_path / name
    path.write_bytes(SEEDS[name])
    facts = probe(path)
    _assert_valid_row(facts, SEEDS[name])
    assert facts["fault"] == ""


@pytest.fixture(scope="module")
def big_png(tmp_path_factory):
    """A PNG of noise that takes about a second to decode: long enough to outlast a tiny limit."""
    import numpy as np

    path = tmp_path_factory.mktemp("slow") / "big.png"
    noise = np.random.default_rng(0).integers(0, 256, (2000, 2000, 3), dtype=np.uint8)
    path.write_bytes(encode(Image.fromarray(noise), "PNG"))
    return path


def _probe_in_a_worker(path, time_limit):
    """probe() as a scan runs it: in a labelprep worker process, where the time limit applies."""
    work = functools.partial(probe, time_limit=time_limit)
    return next(map_ordered(work, [path], jobs=1, isolated=True))


class TestTimeLimit:
    def test_slow_decode_becomes_a_timeout_row_with_its_code(self, big_png):
        started = time.monotonic()
        facts = _probe_in_a_worker(big_png, 0.02)
        assert time.monotonic() - started < 5.0  # the full decode takes longer; a worker's start-up less
        assert facts["fault"] == "timeout" and "0.02 s" in facts["fault_detail"]
        row = manifest.coerce(pd.DataFrame([{"path": "big.png", "label": "x", **facts}]))
        assert codes.parse(check(row)["issues"][0]) == ["timed-out"]
        assert codes.CODES["timed-out"].severity == codes.ERROR
        tally(faults=1)

    def test_a_scan_with_one_job_keeps_the_limit(self, big_png, monkeypatch):
        """One job still probes in a worker, where the limit applies, and this process's SIGALRM
        handler stays the default one."""
        monkeypatch.setattr(scanner, "probe", functools.partial(probe, time_limit=0.02))
        before = signal.getsignal(signal.SIGALRM)
        df = scanner.scan(big_png.parent, jobs=1, layout="folders")
        assert df.loc[df["path"] == "big.png", "fault"].item() == "timeout"
        assert signal.getsignal(signal.SIGALRM) is before

    def test_the_callers_signal_state_is_left_alone(self, big_png):
        """In the caller's own process the probe arms no timer and swaps no handler: SIGALRM is
        the host program's (a limit there would need it)."""
        def mine(signum, frame):
            raise AssertionError("the caller's handler must not fire")

        previous = signal.signal(signal.SIGALRM, mine)
        try:
            seen = []
            original = signal.setitimer
            with pytest.MonkeyPatch.context() as mp:
                mp.setattr(signal, "setitimer", lambda *a: seen.append(a) or original(*a))
                facts = probe(big_png, time_limit=0.02)
            assert facts["fault"] == "" and facts["width"] == 2000  # decoded to the end
            assert seen == [] and signal.getsignal(signal.SIGALRM) is mine
        finally:
            signal.signal(signal.SIGALRM, previous)

    def test_no_limit_in_a_thread(self, big_png):
        """Signals reach only the main thread; elsewhere the probe runs to the end without a limit."""
        from concurrent.futures import ThreadPoolExecutor

        with ThreadPoolExecutor(1) as pool:
            facts = pool.submit(probe, big_png, time_limit=0.02).result()
        assert facts["fault"] == "" and facts["width"] == 2000

    @pytest.mark.parametrize("bad, error", [(0, ValueError), (-1.0, ValueError), ("5", TypeError),
                                            (True, TypeError)])
    def test_bad_time_limit(self, big_png, bad, error):
        with pytest.raises(error, match="time_limit"):
            probe(big_png, time_limit=bad)
