"""Reader contract over every real recording, against pyabf as the reference library and the
facts in the recordings' MANIFEST.md; corrupt files by error kind (tests/badfiles.py).
"""
from __future__ import annotations

import json
import os
import re
import struct
import subprocess
import sys
import warnings
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from conftest import ABF_DIR, ABF_FILES, abf, require_data
from qcd.errors import RecordingError
from qcd.recording import Segment, open_recording

HERE = Path(__file__).resolve().parent
EPS32 = float(np.finfo(np.float32).eps)


def _manifest() -> dict[str, dict]:
    """The recordings' table in MANIFEST.md: name -> format, units, rate, sweeps, gap-free."""
    path = ABF_DIR / "MANIFEST.md"
    if not path.is_file():
        return {}
    rows = {}
    for line in path.read_text(encoding="utf-8").splitlines():
        m = re.match(r"^\| `([^`]+\.abf)` \| (\d+) \| (ABF[12]) \| (\d+) \((.*)\) \| "
                     r"([\d.]+) Hz \| (\d+) \| (yes|no) \|", line)
        if m:
            rows[m.group(1)] = dict(bytes=int(m.group(2)), format=m.group(3),
                                    n_channels=int(m.group(4)),
                                    units=[u.strip() for u in m.group(5).split(",")],
                                    rate=float(m.group(6)), sweeps=int(m.group(7)),
                                    gap_free=m.group(8) == "yes")
    return rows


MANIFEST = _manifest()
NAMES = sorted(MANIFEST) or sorted(p.name for p in ABF_FILES) or ["(no recordings)"]


def _reference(name: str):
    """pyabf with its data loaded: the reference for samples, sweeps and commands."""
    import pyabf
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DeprecationWarning)
        return pyabf.ABF(str(abf(name)))


def test_manifest_lists_every_recording():
    require_data()
    # MANIFEST.md says 24 recordings; the folder must hold exactly those
    assert len(MANIFEST) == 24
    assert sorted(MANIFEST) == sorted(p.name for p in ABF_FILES)


# ------------------------------------------------------------------- samples equal pyabf

@pytest.mark.parametrize("name", NAMES)
def test_scaled_samples_equal_pyabf_data(name):
    ref = _reference(name)
    with open_recording(abf(name)) as rec:
        assert len(rec.channels) == ref.channelCount
        for ch in rec.channels:
            ours = np.concatenate(list(rec.chunks(ch.index)))
            raw = np.concatenate(list(rec.raw_chunks(ch.index)))
            want = ref.data[ch.index]
            assert ours.dtype == np.float64 and ours.shape == want.shape
            if raw.dtype == np.float32:
                # float samples: pyabf does not scale them, so the values must be identical
                assert np.array_equal(ours, want.astype(np.float64))
                continue
            # pyabf scales in float32 (float32(raw) * float32(gain) + float32(offset)); our
            # raw samples and gain/offset must reproduce abf.data bit for bit that way ...
            again = raw.astype(np.float32) * np.float32(ch.gain) + np.float32(ch.offset)
            assert np.array_equal(again, want)
            # ... and our float64 values differ from it only by pyabf's float32 roundings:
            # three roundings (gain, product, sum), each at most eps32/2 of the magnitude
            bound = 2 * EPS32 * (np.abs(raw).max() * abs(ch.gain) + abs(ch.offset))
            assert np.max(np.abs(ours - want)) <= bound


@pytest.mark.parametrize("name", NAMES)
def test_header_facts_match_manifest_and_pyabf(name):
    ref = _reference(name)
    facts = MANIFEST[name]
    with open_recording(abf(name)) as rec:
        assert rec.format == facts["format"]
        assert [c.unit for c in rec.channels] == facts["units"]
        assert rec.n_sweeps == facts["sweeps"] == ref.sweepCount
        assert rec.gap_free is facts["gap_free"]
        # the manifest prints the rate to 3 decimals (odd_sample_rate.abf: 403.226 Hz)
        assert round(rec.fs, 3) == facts["rate"]
        # fs is exact from the header's interval; pyabf's dataRate is it rounded down
        if rec.format == "ABF2":
            interval_us = ref._protocolSection.fADCSequenceInterval
        else:
            interval_us = ref._headerV1.fADCSampleInterval * ref.channelCount
        assert rec.fs == 1e6 / interval_us
        assert int(rec.fs) == ref.dataRate
        assert sum(rec.sweep_lengths) == rec.n_samples == ref.data.shape[1]
        # every sweep, every channel: same samples as pyabf's setSweep (lengths included)
        for k in range(rec.n_sweeps):
            for ch in rec.channels:
                ref.setSweep(k, channel=ch.index)
                mine = rec.sweep(ch.index, k)
                assert len(mine) == rec.sweep_lengths[k] == len(ref.sweepY)
                tol = 2 * EPS32 * max(1.0, float(np.abs(ref.sweepY).max(initial=0.0)))
                np.testing.assert_allclose(mine, ref.sweepY, rtol=0, atol=tol)
        assert len(rec.sweep_starts_s) == rec.n_sweeps
        assert list(rec.sweep_starts_s) == sorted(rec.sweep_starts_s)


@pytest.mark.parametrize("name", NAMES)
def test_samples_lie_within_the_converter_rails(name):
    with open_recording(abf(name)) as rec:
        for ch in rec.channels:
            if ch.rails is None:
                assert rec.format == "ABF2" and any("32-bit floats" in n for n in rec.notes)
                continue
            lo, hi = ch.rails
            step = abs(ch.gain)  # one converter step in the channel unit
            for x in rec.chunks(ch.index):
                assert x.min() >= lo - step * 1e-6 and x.max() <= hi + step * 1e-6


def test_variable_sweep_lengths_come_from_the_sweep_table():
    ref = _reference("variable_sweep_length.abf")
    with open_recording(abf("variable_sweep_length.abf")) as rec:
        synch = ref._synchArraySection.lLength  # multiplexed samples per sweep (pyabf)
        assert rec.sweep_lengths == tuple(n // rec_ch for n, rec_ch in
                                          zip(synch, [len(rec.channels)] * len(synch)))
        assert len(set(rec.sweep_lengths)) == 2
        assert any("different lengths" in n for n in rec.notes)


def test_abf1_sweep_starts_come_from_the_synch_array():
    # MANIFEST.md: vc_step_abf1.abf sweeps start a minute apart, not one sweep length (3 s)
    with open_recording(abf("vc_step_abf1.abf")) as rec:
        gaps = np.diff(rec.sweep_starts_s)
        np.testing.assert_allclose(gaps, 60.0, rtol=0, atol=1e-6)
        assert rec.sweep_lengths[0] / rec.fs == pytest.approx(3.0)


def test_abf2_sweep_starts_agree_with_the_protocol_interval():
    ref = _reference("cc_steps.abf")
    with open_recording(abf("cc_steps.abf")) as rec:
        # pyabf's sweep times are k * fEpisodeStartToStart (5 s here); the synch array agrees
        np.testing.assert_allclose(rec.sweep_starts_s, ref.sweepTimesSec, rtol=0, atol=1e-9)


def test_odd_sample_rate_is_exact_and_noted():
    with open_recording(abf("odd_sample_rate.abf")) as rec:
        assert rec.fs == pytest.approx(1e6 / 2480.0, rel=1e-12)  # 2480 us interval, ~403.2258
        assert any("not a whole number" in n for n in rec.notes)


def test_four_channel_abf1_twin_within_one_converter_step():
    # MANIFEST.md: the same recording saved as ABF1 holds values within one converter step
    with open_recording(abf("four_channel_no_cell.abf")) as r2, \
            open_recording(abf("four_channel_no_cell_abf1.abf")) as r1:
        assert r1.sweep_lengths == r2.sweep_lengths and r1.fs == r2.fs
        for c1, c2 in zip(r1.channels, r2.channels):
            a = np.concatenate(list(r1.chunks(c1.index)))
            b = np.concatenate(list(r2.chunks(c2.index)))
            step = max(abs(c1.gain), abs(c2.gain))
            assert np.max(np.abs(a - b)) <= step * (1 + 1e-6)


def test_dates_that_cannot_be_right_become_none_with_a_note():
    # MANIFEST.md: abf1_invalid_date.abf has an invalid date (pyabf gives year 1);
    # abf13_junk_header.abf has an impossible start date (pyabf gives 1806)
    for name in ("abf1_invalid_date.abf", "abf13_junk_header.abf"):
        with open_recording(abf(name)) as rec:
            assert rec.recorded_at is None
            assert any("start date" in n for n in rec.notes)
    with open_recording(abf("vc_step_family.abf")) as rec:
        assert rec.recorded_at is not None and rec.recorded_at.year == 2017
        assert rec.recorded_at == _reference("vc_step_family.abf").abfDateTime


def test_abf1_without_a_date_does_not_take_the_copy_time(tmp_path):
    # ABF1 keeps its start date at byte 20 (pyabf's header module); 0 means "no date", and
    # pyabf then substitutes the file's creation time, which a copy changes
    data = bytearray(abf("cc_steps_abf1.abf").read_bytes())
    struct.pack_into("<i", data, 20, 0)
    path = tmp_path / "no_date.abf"
    path.write_bytes(bytes(data))
    with open_recording(path) as rec:
        assert rec.recorded_at is None
        assert any("creation time" in n for n in rec.notes)


def test_units_are_cleaned_and_tags_read():
    with open_recording(abf("sine sweep unknown units.abf")) as rec:
        assert rec.channels[0].unit == "?"
    with open_recording(abf("vc_step_series_tagged.abf")) as rec:
        assert len(rec.tags) == 1  # MANIFEST.md: one tag
    for name in NAMES:
        with open_recording(abf(name)) as rec:
            for c in rec.channels:
                assert c.unit and "\x00" not in c.unit and c.unit == c.unit.strip()
                assert c.name and "\x00" not in c.name


# -------------------------------------------------------------------- commands vs pyabf

PROTOCOL_FILES = ["vc_model_cell_step.abf", "vc_step_family.abf", "cc_steps.abf",
                  "vc_tight_seal_noisy.abf", "vc_recorded_command_3ch.abf",
                  "four_channel_no_cell.abf", "vc_holding_change_pressure.abf",
                  "vc_cell_step.abf", "vc_step_series_tagged.abf", "cc_steps_abf1.abf"]
_PYABF_KIND = {"Step": "step", "Ramp": "ramp", "Pulse": "pulse"}


@pytest.mark.parametrize("name", PROTOCOL_FILES)
def test_command_segments_match_pyabf_epochs_and_sweepC(name):
    ref = _reference(name)
    with open_recording(abf(name)) as rec:
        assert rec.commands, f"{name} has a protocol"
        for ch, cmd in rec.commands.items():
            assert cmd.enabled
            for k in range(rec.n_sweeps):
                ref.setSweep(k, channel=ch)  # pyabf's epoch table for this sweep (test only)
                ep = ref.sweepEpochs
                n = rec.sweep_lengths[k]
                want = []
                for i, (p1, p2, lvl, typ) in enumerate(zip(ep.p1s, ep.p2s, ep.levels,
                                                           ep.types)):
                    a, b = max(0, min(p1, n)), max(0, min(p2, n))
                    if b > a:  # pyabf keeps empty epochs; ours drops them
                        kind = "holding" if i in (0, len(ep.p1s) - 1) else _PYABF_KIND[typ]
                        want.append((a, b, pytest.approx(lvl, abs=1e-9), kind))
                got = [(s.start, s.stop, s.level, s.kind) for s in cmd.levels(k)]
                assert got == want, f"{name} channel {ch} sweep {k}"
                # the drawn waveform equals pyabf's sweepC sample by sample
                np.testing.assert_allclose(cmd.waveform(k), ref.sweepC, rtol=0, atol=1e-9)


def test_step_family_changes_step_size_every_sweep():
    # MANIFEST.md: vc_step_family.abf is a family whose step size changes every sweep
    with open_recording(abf("vc_step_family.abf")) as rec:
        cmd = rec.commands[0]
        # the level 0.75 s in (inside the second epoch) differs in every sweep
        at = int(0.75 * rec.fs)
        levels = [next(s.level for s in cmd.levels(k) if s.start <= at < s.stop)
                  for k in range(rec.n_sweeps)]
        assert len(set(levels)) == rec.n_sweeps
        assert np.all(np.diff(levels) > 0)
        assert cmd.unit == "mV"


def test_abf1_holding_comes_from_the_header_not_the_first_epoch():
    # The ABF2 twin of four_channel_no_cell_abf1.abf holds -10 and -20 mV on commands 0 and 1;
    # pyabf's ABF1 holding (first epoch levels) would give 10 and 0 mV.
    with open_recording(abf("four_channel_no_cell.abf")) as r2, \
            open_recording(abf("four_channel_no_cell_abf1.abf")) as r1:
        assert set(r1.commands) == {0, 1}  # ABF1 stores epoch tables for two commands only
        for ch in (0, 1):
            assert r1.commands[ch].holding == r2.commands[ch].holding
            for k in range(r1.n_sweeps):
                assert r1.commands[ch].levels(k) == r2.commands[ch].levels(k)
        assert any("two command channels" in n for n in r1.notes)


def test_disabled_command_is_holding_only_but_keeps_its_epochs():
    ref = _reference("cc_single_sweep_abf1.abf")
    with open_recording(abf("cc_single_sweep_abf1.abf")) as rec:
        cmd = rec.commands[0]
        assert not cmd.enabled and cmd.epochs
        assert cmd.levels(0) == (Segment(0, rec.sweep_lengths[0], cmd.holding, "holding"),)
        # pyabf's sweepC of a disabled command is its holding level throughout
        ref.setSweep(0, channel=0)
        assert np.all(ref.sweepC == ref.sweepC[0])
        assert any("not output" in n for n in rec.notes)


def test_user_list_protocol_is_noted():
    # MANIFEST.md: cc_user_list_steps.abf takes its levels from a per-sweep list
    with open_recording(abf("cc_user_list_steps.abf")) as rec:
        assert any("user list" in n for n in rec.notes)


def test_files_without_protocol_epochs_have_no_commands():
    for name in ("gapfree_16_channels.abf", "fast_100khz_temperature.abf",
                 "odd_sample_rate.abf", "abf13_junk_header.abf"):
        with open_recording(abf(name)) as rec:
            assert rec.commands == {}


# ------------------------------------------------------------ chunking and file handles

_PROP_FILE = "four_channel_no_cell.abf"


@settings(max_examples=40, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(size=st.integers(1, 50_000), channel=st.integers(0, 3),
       sweep=st.one_of(st.none(), st.integers(0, 9)),
       start=st.integers(0, 45_000), length=st.integers(0, 45_000))
def test_any_chunk_size_gives_the_same_samples(size, channel, sweep, start, length):
    with open_recording(abf(_PROP_FILE)) as rec:
        whole = rec.sweep(channel, sweep) if sweep is not None else \
            np.concatenate(list(rec.chunks(channel)))
        stop = start + length
        parts = list(rec.chunks(channel, sweep, size=size, start=start, stop=stop))
        assert all(0 < len(p) <= size for p in parts)
        got = np.concatenate(parts) if parts else np.empty(0)
        assert np.array_equal(got, whole[start:stop])


@settings(max_examples=25, deadline=None)
@given(size=st.integers(1, 50_000), channel=st.one_of(st.none(), st.integers(0, 3)),
       start=st.integers(0, 450_000), length=st.integers(0, 450_000))
def test_reused_chunk_buffer_gives_the_same_raw_samples(size, channel, start, length):
    # raw_chunks(reuse=True) reads each chunk into the buffer of the one before: every chunk,
    # copied out before the next is asked for, equals the plain read (numpy.fromfile)
    with open_recording(abf(_PROP_FILE)) as rec:
        stop = start + length
        if channel is None:
            plain = list(rec.raw_chunks_all(None, size=size, start=start, stop=stop))
            reused = [x.copy() for x in rec.raw_chunks_all(None, size=size, start=start,
                                                           stop=stop, reuse=True)]
        else:
            plain = list(rec.raw_chunks(channel, None, size=size, start=start, stop=stop))
            reused = [x.copy() for x in rec.raw_chunks(channel, None, size=size, start=start,
                                                       stop=stop, reuse=True)]
        assert len(plain) == len(reused)
        for a, b in zip(plain, reused):
            assert a.dtype == b.dtype and np.array_equal(a, b)


def test_reused_chunk_of_a_truncated_file_is_a_specific_error(tmp_path):
    src = abf(_PROP_FILE)
    path = tmp_path / "cut.abf"
    path.write_bytes(src.read_bytes())
    with open_recording(path) as rec:
        n = rec.n_samples
        with open(path, "r+b") as fh:               # the file shrinks after its header was read
            fh.truncate(path.stat().st_size - 1000)
        with pytest.raises(RecordingError, match="values at sample"):
            for _ in rec.raw_chunks(0, None, size=n, reuse=True):
                pass


def _maps_of(path: Path) -> list[str]:
    with open("/proc/self/maps") as fh:
        return [line for line in fh if str(path) in line]


@pytest.mark.skipif(not Path("/proc/self/maps").exists(), reason="needs /proc (Linux)")
def test_no_memory_map_stays_open_between_reads(tmp_path):
    src = abf("vc_step_family.abf")
    path = tmp_path / "copy.abf"
    path.write_bytes(src.read_bytes())
    rec = open_recording(path)
    gen = rec.chunks(0, size=1000)
    next(gen)
    gen.close()                       # abandoned half-way
    assert _maps_of(path) == []
    for _ in rec.chunks(0):
        pass
    assert _maps_of(path) == []
    # the writer can rename the file while the Recording object exists
    path.rename(tmp_path / "renamed.abf")
    rec.close()
    with pytest.raises(ValueError):
        next(rec.chunks(0))


def test_files_written_by_pyabf_read_as_pyabf_reads_them(tmp_path):
    # pyabf's ABF1 writer (2 KB header) is the reference producer here; benchmarks use it
    import pyabf
    import pyabf.abfWriter
    sweeps = np.random.default_rng(3).normal(0.0, 5.0, (3, 4000))
    path = tmp_path / "written.abf"
    pyabf.abfWriter.writeABF1(sweeps, str(path), 20000.0, "pA")
    ref = pyabf.ABF(str(path))
    with open_recording(path) as rec:
        assert rec.fs == 20000.0 and rec.sweep_lengths == (4000,) * 3
        assert rec.channels[0].unit == "pA"
        got = np.concatenate(list(rec.chunks(0)))
        bound = 2 * EPS32 * 32768 * abs(rec.channels[0].gain)
        assert np.max(np.abs(got - ref.data[0])) <= bound
    # a file shorter than the 5806 header bytes pyabf reads cannot be opened by it at all
    pyabf.abfWriter.writeABF1(sweeps[:1, :500], str(path), 20000.0, "pA")
    with pytest.raises(RecordingError) as e:
        open_recording(path)
    assert e.value.kind == "unsupported"


def test_unknown_suffix_is_unsupported(tmp_path):
    p = tmp_path / "trace.dat"
    p.write_bytes(b"TRACE" + bytes(600))
    with pytest.raises(RecordingError) as e:
        open_recording(p)
    assert e.value.kind == "unsupported" and str(p) in str(e.value)
    # the ABF signature routes a file to the ABF reader whatever its suffix
    p.write_bytes(b"ABF2" + bytes(600))
    with pytest.raises(RecordingError) as e:
        open_recording(p)
    assert e.value.kind == "bad_header"


# -------------------------------------------------------------------------- bad files

@pytest.fixture(scope="module")
def bad_results(tmp_path_factory):
    """Every corrupt case opened in a subprocess under a 256 MB address-space limit."""
    require_data()
    folder = tmp_path_factory.mktemp("bad")
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(HERE.parent), str(HERE)]))
    out = subprocess.run(
        [sys.executable, str(HERE / "badfiles.py"), str(folder),
         str(abf("vc_model_cell_step.abf")), str(abf("cc_steps_abf1.abf")), "256"],
        capture_output=True, text=True, timeout=120, env=env, check=False)
    assert out.returncode == 0, out.stderr[-2000:]
    lines = [json.loads(x) for x in out.stdout.splitlines() if x.strip()]
    assert lines[-1].get("done"), out.stderr[-2000:]
    return {d.get("name", "(fuzz)"): d for d in lines[:-1]}


def _case_names() -> list[str]:
    src = (HERE / "badfiles.py").read_text(encoding="utf-8")
    names = re.findall(r'put\("(\w+)"', src) + re.findall(r'cases\.append\(\("(\w+)"', src)
    return [n for n in names if n != "no_read_permission" or os.geteuid() != 0]


@pytest.mark.parametrize("case", _case_names())
def test_bad_file_gives_recording_error_of_its_kind(bad_results, case):
    r = bad_results[case]
    assert r["type"] == "RecordingError", r      # never any other exception type
    assert r["kind"] == r["expected"], r
    assert r["message"].startswith(r["path"] + ": ")  # names the file
    assert len(r["message"]) > len(r["path"]) + 30     # and says why
    assert r["seconds"] < 2.0, r                  # bounded time
    assert r["peak_bytes"] < 16 * 2**20, r        # no big allocation before failing


def test_random_corruptions_give_only_recording_errors(bad_results):
    fuzz = bad_results["(fuzz)"]
    assert fuzz["other"] == []          # opened fine or RecordingError: nothing else, ever
    assert fuzz["slowest"] < 2.0        # no hang on any of them
    assert sum(fuzz["outcomes"].values()) == fuzz["fuzz"] == 300
    assert fuzz["outcomes"].get("bad_header", 0) > 0 and fuzz["outcomes"].get("ok", 0) > 0


def test_bad_table_covers_every_case(bad_results):
    assert set(bad_results) - {"(fuzz)"} == set(_case_names())
    if os.geteuid() == 0:
        # root reads files whatever their mode, so the mode-000 case cannot fail here; the
        # dangling link, the link loop and the missing path stand in for 'unreadable'
        assert "no_read_permission" not in bad_results
