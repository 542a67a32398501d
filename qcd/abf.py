"""ABF1/ABF2 header -> a format-neutral Layout, through pyabf with loadData=False (no samples).

The raw header bytes are checked first (signature, counts, section extents, size), so garbage
can never make pyabf hang or allocate hugely; pyabf's own exceptions are wrapped in
RecordingError. Imports qcd.errors only. Over 500 lines: the two header versions' byte
checks belong with the one layout they fill.
"""
from __future__ import annotations

import math
import os
import stat
import struct
import warnings
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path

import numpy as np

from qcd.errors import RecordingError

__all__ = ["Layout", "ChannelLayout", "Epoch", "CommandLayout", "Segment", "read_layout",
           "epoch_segments", "check_file", "MAX_CHANNELS", "MAX_SWEEPS"]

MAX_CHANNELS = 64
MAX_SWEEPS = 1_000_000
_MAX_TAGS = 100_000
_MAX_TABLE = 4096            # epochs, DACs, user-list rows
_MAX_STRINGS_BYTES = 1 << 20  # pyabf reads the strings section byte by byte
_ABF1_HEADER_READ = 5806     # pyabf's ABF1 reader unpacks fields up to this byte
_EPOCH_KINDS = {1: "step", 2: "ramp", 3: "pulse", 4: "triangle", 5: "cosine", 7: "biphasic"}


@dataclass(frozen=True)
class Segment:
    """A piece of a sweep's command: samples [start, stop) within the sweep at ``level``.

    ``kind`` is 'holding' (before/after the epochs), 'step', 'ramp' (linear from the previous
    segment's level to ``level``), 'pulse', 'triangle', 'cosine', 'biphasic' (trains between
    the previous level and ``level`` with ``period``/``width`` in samples) or 'unknown'.
    """
    start: int
    stop: int
    level: float
    kind: str
    period: int = 0
    width: int = 0


@dataclass(frozen=True)
class Epoch:
    """One row of a protocol's epoch table (durations in samples, levels in the command unit)."""
    number: int
    kind: str
    level: float
    level_inc: float
    duration: int
    duration_inc: int
    period: int = 0
    width: int = 0


@dataclass(frozen=True)
class CommandLayout:
    """The epoch table of the command (DAC) channel paired with input channel ``channel``."""
    channel: int
    unit: str
    name: str
    holding: float
    enabled: bool                  # False: the header says this waveform was not output
    epochs: tuple[Epoch, ...]
    keep_last_level: bool          # between sweeps the output stays at the last epoch level
    sweep_length: int              # the length pyabf builds the epoch waveform over


@dataclass(frozen=True)
class ChannelLayout:
    """One input channel of the header: name, unit, scaling, rails and filter."""
    index: int
    name: str
    unit: str
    gain: float                    # value = raw * gain + offset (pyabf's scaling)
    offset: float
    rails: tuple[float, float] | None
    filter_hz: float | None
    filter_source: str | None      # 'telegraph' | 'header' | None


@dataclass(frozen=True)
class Layout:
    """Everything the generic reader needs: where the samples are and what they mean."""
    path: Path
    format: str                    # 'ABF1' | 'ABF2'
    version: str
    file_size: int
    data_offset: int               # byte where the interleaved samples start
    dtype: np.dtype                # int16 or float32 (little-endian)
    n_channels: int
    n_samples: int                 # per channel, all sweeps
    fs: float
    gap_free: bool
    sweep_lengths: tuple[int, ...]
    sweep_starts_s: tuple[float, ...]
    channels: tuple[ChannelLayout, ...]
    commands: tuple[CommandLayout, ...]
    recorded_at: datetime | None
    tags: tuple[tuple[float, str], ...] = ()
    notes: tuple[str, ...] = field(default=())


# ---------------------------------------------------------------------------------- checks

def _err(path: Path, kind: str, detail: str) -> RecordingError:
    return RecordingError(path, kind, detail)


def check_file(path: Path) -> int:
    """Raise RecordingError unless ``path`` is a readable, non-empty regular file; its size."""
    try:
        st = os.stat(path)
    except FileNotFoundError as e:
        raise _err(path, "unreadable", "the file does not exist (or is a broken link); it was "
                   "moved or deleted before it could be read") from e
    except OSError as e:
        raise _err(path, "unreadable", f"the system refused to look at the file "
                   f"({e.strerror or e}); check permissions and links") from e
    if stat.S_ISDIR(st.st_mode):
        raise _err(path, "not_a_file", "this is a folder, not a recording file; only its "
                   "name ends like a recording's")
    if not stat.S_ISREG(st.st_mode):
        raise _err(path, "not_a_file", "this is a special file (pipe, device or socket), "
                   "not a regular recording file")
    if st.st_size == 0:
        raise _err(path, "empty", "the file is empty (0 bytes); acquisition may not have "
                   "written it yet, or the copy failed")
    try:
        with open(path, "rb") as fh:
            fh.read(1)
    except OSError as e:
        raise _err(path, "unreadable", f"the file cannot be opened for reading "
                   f"({e.strerror or e}); check its permissions") from e
    return st.st_size


def _read_head(path: Path, n: int) -> bytes:
    try:
        with open(path, "rb") as fh:
            return fh.read(n)
    except OSError as e:
        raise _err(path, "unreadable", f"reading the header failed ({e.strerror or e})") from e


def _finite(x: float) -> bool:
    return isinstance(x, (int, float)) and math.isfinite(x)


# ABF2 section table: name -> (offset of its entry in the header, cap on entries, smallest entry
# pyabf reads per item). pyabf loops over every entry in Python and preallocates lists.
_ABF2_SECTIONS = {
    "protocol": (76, 1, 208),
    "adc": (92, MAX_CHANNELS, 82),
    "dac": (108, MAX_CHANNELS, 132),
    "epoch": (124, _MAX_TABLE, 4),
    "epoch_per_dac": (156, _MAX_TABLE, 30),
    "user_list": (172, _MAX_TABLE, 10),
    "strings": (220, _MAX_TABLE, 1),
    "data": (236, 1 << 62, 2),
    "tag": (252, _MAX_TAGS, 64),
    "synch": (316, MAX_SWEEPS, 8),
}
_PLAIN = {"protocol": "protocol section", "adc": "input-channel table",
          "dac": "command-channel table", "epoch": "epoch table",
          "epoch_per_dac": "per-command epoch table", "user_list": "user-list table",
          "strings": "text section", "data": "data section", "tag": "tag list",
          "synch": "sweep table"}


def _precheck_abf2(path: Path, size: int, head: bytes) -> dict[str, tuple[int, int, int]]:
    if size < 512 or len(head) < 512:
        raise _err(path, "truncated", f"the file has {size} bytes but an ABF2 header needs "
                   f"512; it was cut short or is still being written")
    sections: dict[str, tuple[int, int, int]] = {}
    for name, (off, cap, min_entry) in _ABF2_SECTIONS.items():
        block, entry, count = struct.unpack_from("<IIq", head, off)
        if count < 0 or count > cap:
            raise _err(path, "bad_header", f"the header's {_PLAIN[name]} claims {count} "
                       f"entries (expected 0..{cap}); the header is corrupt")
        if count and (entry < min_entry or entry > 65536):
            raise _err(path, "bad_header", f"the header's {_PLAIN[name]} has entries of "
                       f"{entry} bytes (expected {min_entry}..65536); the header is corrupt")
        sections[name] = (block * 512, entry, count)
    if sections["protocol"][2] != 1 or sections["protocol"][0] < 512:
        raise _err(path, "bad_header", "the header has no protocol section (expected one "
                   "entry after the first 512 bytes); the header is corrupt")
    n_adc = sections["adc"][2]
    if not 1 <= n_adc <= MAX_CHANNELS:
        raise _err(path, "bad_header", f"the header lists {n_adc} input channels (expected "
                   f"1..{MAX_CHANNELS}); the header is corrupt")
    start, entry, count = sections["strings"]
    if count == 0 or entry * count > _MAX_STRINGS_BYTES:
        raise _err(path, "bad_header", f"the header's text section has {count} entries of "
                   f"{entry} bytes (expected 1 or more, at most {_MAX_STRINGS_BYTES} bytes in "
                   f"all); the header is corrupt")
    fmt = struct.unpack_from("<H", head, 30)[0]
    if fmt not in (0, 1):
        raise _err(path, "bad_header", f"the header's sample format code is {fmt} (expected "
                   f"0 for 16-bit integers or 1 for 32-bit floats); the header is corrupt")
    d_start, d_entry, d_count = sections["data"]
    if d_entry != (2 if fmt == 0 else 4):
        raise _err(path, "bad_header", f"samples are {d_entry} bytes each but the sample "
                   f"format says {2 if fmt == 0 else 4}; the header is corrupt")
    if d_count == 0:
        raise _err(path, "bad_header", "the header declares no samples; the acquisition was "
                   "aborted or the file was closed before any data were written")
    if d_start < 512:
        raise _err(path, "bad_header", f"the data section starts at byte {d_start}, inside "
                   f"the header (expected 512 or later); the header is corrupt")
    episodes = struct.unpack_from("<I", head, 12)[0]
    if episodes > MAX_SWEEPS:
        raise _err(path, "bad_header", f"the header claims {episodes} sweeps (expected at most "
                   f"{MAX_SWEEPS}); the header is corrupt")
    # Every section pyabf reads must lie inside the file; the synch array and tags come after
    # the data, so a file cut short loses them first.
    for name, (start, entry, count) in sections.items():
        if name == "data":
            continue
        need = max(entry, 208) if name == "protocol" else entry * count
        if count and start + need > size:
            raise _err(path, "truncated", f"the header's {_PLAIN[name]} ends at byte "
                       f"{start + need} but the file has {size} bytes; it was cut short or "
                       f"is still being written")
    return sections


def _precheck_abf1(path: Path, size: int, head: bytes) -> None:
    if size < _ABF1_HEADER_READ or len(head) < _ABF1_HEADER_READ:
        if len(head) >= 2048:  # an old 2 KB header: complete if its samples fit in the file
            ptr, acq = struct.unpack_from("<i", head, 40)[0], struct.unpack_from("<i", head, 10)[0]
            if 4 <= ptr and acq > 0 and ptr * 512 + 2 * acq <= size:
                raise _err(path, "unsupported", f"a short ABF1 file ({size} bytes) with a 2 KB "
                           f"header: the header library reads {_ABF1_HEADER_READ} header bytes"
                           f" and cannot open files shorter than that")
        raise _err(path, "truncated", f"the file has {size} bytes but an ABF1 header needs "
                   f"{_ABF1_HEADER_READ}; it was cut short or is still being written")
    version = struct.unpack_from("<f", head, 4)[0]
    if not (_finite(version) and 1.0 <= version < 2.0):
        raise _err(path, "bad_header", f"the header's format version is {version!r} (expected "
                   f"1.x for this signature); the header is corrupt")
    n_ch = struct.unpack_from("<h", head, 120)[0]
    if not 1 <= n_ch <= 16:
        raise _err(path, "bad_header", f"the header lists {n_ch} input channels (expected "
                   f"1..16 for ABF1); the header is corrupt")
    seq = struct.unpack_from("<16h", head, 410)
    if any(not 0 <= s <= 15 for s in seq[:n_ch]):
        raise _err(path, "bad_header", f"the channel sampling sequence {list(seq[:n_ch])} "
                   f"names channels outside 0..15; the header is corrupt")
    acq = struct.unpack_from("<i", head, 10)[0]
    if acq <= 0:
        raise _err(path, "bad_header", f"the header declares {acq} samples (expected a "
                   f"positive count); the acquisition was aborted or the header is corrupt")
    episodes = struct.unpack_from("<i", head, 16)[0]
    if not 0 <= episodes <= MAX_SWEEPS:
        raise _err(path, "bad_header", f"the header claims {episodes} sweeps (expected "
                   f"0..{MAX_SWEEPS}); the header is corrupt")
    fmt = struct.unpack_from("<h", head, 100)[0]
    if fmt == 1:
        raise _err(path, "unsupported", "ABF1 with 32-bit float samples is not supported by "
                   "the header library (expected 16-bit integer samples)")
    if fmt != 0:
        raise _err(path, "bad_header", f"the sample format code is {fmt} (expected 0 or 1); "
                   f"the header is corrupt")
    data_ptr = struct.unpack_from("<i", head, 40)[0]
    if data_ptr < 4:
        raise _err(path, "bad_header", f"the data section starts at block {data_ptr}, inside "
                   f"the header (expected block 4 or later); the header is corrupt")
    interval = struct.unpack_from("<f", head, 122)[0]
    if not (_finite(interval) and 0.01 <= interval <= 1e8):
        raise _err(path, "bad_header", f"the sample interval is {interval!r} us (expected "
                   f"0.01..1e8); the header is corrupt")
    tag_ptr, n_tags = struct.unpack_from("<ii", head, 44)
    if not 0 <= n_tags <= _MAX_TAGS:
        raise _err(path, "bad_header", f"the header claims {n_tags} tags (expected "
                   f"0..{_MAX_TAGS}); the header is corrupt")
    if n_tags and (tag_ptr < 0 or tag_ptr * 512 + 64 * n_tags > size):
        raise _err(path, "truncated", f"the tag list (block {tag_ptr}, {n_tags} tags) lies "
                   f"beyond the file's {size} bytes; it was cut short")
    synch_ptr, n_synch = struct.unpack_from("<ii", head, 92)
    if not 0 <= n_synch <= MAX_SWEEPS:
        raise _err(path, "bad_header", f"the sweep table claims {n_synch} entries (expected "
                   f"0..{MAX_SWEEPS}); the header is corrupt")
    if n_synch and (synch_ptr < 0 or synch_ptr * 512 + 8 * n_synch > size):
        raise _err(path, "truncated", f"the sweep table (block {synch_ptr}, {n_synch} entries)"
                   f" lies beyond the file's {size} bytes; it was cut short")


def _open_pyabf(path: Path, notes: list[str]):
    import pyabf  # imported here: the CLI and workers stay cheap to start
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            abf = pyabf.ABF(str(path), loadData=False)
        except (Exception, MemoryError, RecursionError) as e:  # noqa: BLE001 - wrap them all
            raise _err(path, "bad_header", f"the header could not be parsed "
                       f"({type(e).__name__}: {str(e)[:120]}); the file is corrupt or not a "
                       f"recording") from e
    for w in caught:
        notes.append(f"header library warning: {str(w.message)[:200]}")
    return abf


# ---------------------------------------------------------------------------------- layout

def _clean(text: object) -> str:
    s = text.decode("ascii", "ignore") if isinstance(text, bytes) else str(text or "")
    s = s.replace("\x00", "").strip()
    return s or "?"


def _date(path: Path, abf, notes: list[str]) -> datetime | None:
    if abf.abfVersion["major"] == 1 and abf._headerV1.lFileStartDate == 0:
        notes.append("the header holds no start date; the file's creation time (which changes "
                     "when a file is copied) is not used, recorded_at is unknown")
        return None
    when = getattr(abf, "abfDateTime", None)
    if not isinstance(when, datetime) or when.year < 1980 or when.year > 2100:
        notes.append(f"the header's start date is invalid ({getattr(abf, 'abfDateTimeString', '?')}"
                     f"); recorded_at is unknown")
        return None
    return when


def _rails(abf, gain: float, offset: float, is_float: bool) -> tuple[float, float] | None:
    if is_float:
        return None
    if abf.abfVersion["major"] == 1:
        res = abf._headerV1.lADCResolution
    else:
        res = abf._protocolSection.lADCResolution
    if not isinstance(res, int) or not 2 <= res <= 32768:
        res = 32768
    lo, hi = -res * gain + offset, (res - 1) * gain + offset
    return (min(lo, hi), max(lo, hi))


def _good_filter(x: object) -> bool:
    return _finite(x) and 0.0 < float(x) < 1e6


def _filter(abf, i: int, head: bytes, old_abf1: bool) -> tuple[float | None, str | None]:
    if abf.abfVersion["major"] == 2:
        adc = abf._adcSection
        tel, tel_f, sig_f = adc.nTelegraphEnable[i], adc.fTelegraphFilter[i], \
            adc.fSignalLowpassFilter[i]
    else:
        h = abf._headerV1
        phys = h.nADCSamplingSeq[i]
        tel = 0 if old_abf1 else h.nTelegraphEnable[phys]
        tel_f = h.fTelegraphFilter[phys]
        sig_f = struct.unpack_from("<16f", head, 1178)[phys]
    if tel == 1 and _good_filter(tel_f):
        return float(tel_f), "telegraph"
    if _good_filter(sig_f):
        return float(sig_f), "header"
    return None, None


def _abf1_synch(path: Path, head: bytes) -> np.ndarray | None:
    ptr, n = struct.unpack_from("<ii", head, 92)
    if n <= 0:
        return None
    with open(path, "rb") as fh:
        fh.seek(ptr * 512)
        buf = fh.read(8 * n)
    return np.frombuffer(buf, "<i4").reshape(-1, 2).astype(np.int64)


def _sweeps(path: Path, abf, head: bytes, n_ch: int, n_per_ch: int, fs: float, gap_free: bool,
            notes: list[str]) -> tuple[tuple[int, ...], tuple[float, ...]]:
    if gap_free:
        return (n_per_ch,), (0.0,)
    n_sweeps = max(1, int(abf.sweepCount))
    if abf.abfVersion["major"] == 1:
        synch = _abf1_synch(path, head)
        unit_us = abf._headerV1.fSynchTimeUnit
        tick_us = abf._headerV1.fADCSampleInterval           # one conversion (all channels)
    else:
        s = abf._synchArraySection
        synch = np.array([s.lStart, s.lLength], dtype=np.int64).T if s._entryCount else None
        unit_us = abf._protocolSection.fSynchTimeUnit
        tick_us = abf._protocolSection.fADCSequenceInterval / n_ch
    equal = n_per_ch // n_sweeps
    lengths: tuple[int, ...] = (equal,) * n_sweeps
    if n_per_ch % n_sweeps:
        notes.append(f"{n_per_ch} samples per channel do not divide into {n_sweeps} equal "
                     f"sweeps; the last {n_per_ch % n_sweeps} samples are not in any sweep")
    starts = tuple(k * equal / fs for k in range(n_sweeps))
    if synch is None or len(synch) != n_sweeps:
        if synch is not None:
            notes.append(f"the sweep table has {len(synch)} entries for {n_sweeps} sweeps; "
                         f"sweeps are taken as equal parts of the data")
        interval = getattr(abf, "sweepIntervalSec", 0.0)
        if abf.abfVersion["major"] == 2 and _finite(interval) and interval > 0:
            starts = tuple(k * float(interval) for k in range(n_sweeps))
        return lengths, starts
    if _finite(unit_us) and unit_us > 0:
        t_starts = synch[:, 0] * float(unit_us) * 1e-6
    else:
        t_starts = synch[:, 0] * float(tick_us) * 1e-6
    if np.all(np.isfinite(t_starts)) and t_starts.min() >= 0 and np.all(np.diff(t_starts) > 0):
        starts = tuple(float(t) for t in t_starts)
    else:
        notes.append("the sweep table's start times are not increasing; sweeps are taken to "
                     "follow each other without gaps")
    if synch[:, 1].min() > 0 and int(synch[:, 1].sum()) // n_ch <= n_per_ch \
            and not (synch[:, 1] % n_ch).any():
        real = tuple(int(x) // n_ch for x in synch[:, 1])
        if len(set(real)) > 1:
            notes.append(f"sweeps have different lengths ({min(real)}..{max(real)} samples); "
                         f"lengths come from the file's sweep table")
        lengths = real
    elif int(synch[:, 1].sum()) // n_ch != n_per_ch:
        notes.append("the sweep table's lengths do not match the data size; sweeps are taken "
                     "as equal parts of the data")
    return lengths, starts


def _epoch_kind(code: int) -> str:
    return _EPOCH_KINDS.get(int(code), "unknown")


def _commands(path: Path, abf, head: bytes, n_ch: int, sweep_len: int, old_abf1: bool,
              mode: int, notes: list[str]) -> tuple[CommandLayout, ...]:
    out: list[CommandLayout] = []
    if mode == 3:
        return ()
    if mode == 1:
        notes.append("event-driven sweeps of varying length: the protocol's epoch table is not "
                     "applied per sweep, no command levels are given")
        return ()
    if abf.abfVersion["major"] == 1:
        if old_abf1:
            notes.append(f"ABF1 version {abf.abfVersionString}: the header has no usable epoch "
                         f"table, no command levels are given")
            return ()
        h = abf._headerV1
        holding_hdr = struct.unpack_from("<4f", head, 1394)
        for ch in range(min(n_ch, 2)):
            epochs = []
            for i in range(10 * ch, 10 * ch + 10):
                if h.nEpochType[i] == 0:
                    continue
                epochs.append(Epoch(i % 10, _epoch_kind(h.nEpochType[i]),
                                    float(h.fEpochInitLevel[i]), float(h.fEpochLevelInc[i]),
                                    int(h.lEpochInitDuration[i]), int(h.lEpochDurationInc[i])))
            if not epochs:
                continue
            holding = float(holding_hdr[ch])
            if not (_finite(holding) and abs(holding) <= 1e6):
                notes.append(f"command {ch}: the header's holding level is invalid; 0 is used")
                holding = 0.0
            enabled = h.nWaveformEnable[ch] == 1 and h.nWaveformSource[ch] == 1
            out.append(CommandLayout(ch, _clean(h.sDACChannelUnit[ch]),
                                     _clean(h.sDACChannelName[ch]), holding, enabled,
                                     tuple(epochs), bool(h.nInterEpisodeLevel[ch]), sweep_len))
        if any(e.kind not in ("step", "ramp") for c in out for e in c.epochs):
            notes.append("ABF1 train epochs (pulse and the like): their period and width are "
                         "not read, so their segments have period 0 and waveform() draws them "
                         "at the previous level, as the header library does")
        if n_ch > 2 and out:
            notes.append("ABF1 holds epoch tables for two command channels only; input channels"
                         " from 2 on have no command (the header library reuses channel 0's)")
    else:
        dac, per = abf._dacSection, abf._epochPerDacSection
        for ch in range(min(n_ch, dac._entryCount)):
            epochs = [Epoch(int(per.nEpochNum[i]), _epoch_kind(per.nEpochType[i]),
                            float(per.fEpochInitLevel[i]), float(per.fEpochLevelInc[i]),
                            int(per.lEpochInitDuration[i]), int(per.lEpochDurationInc[i]),
                            int(per.lEpochPulsePeriod[i]), int(per.lEpochPulseWidth[i]))
                      for i in range(per._entryCount)
                      if per.nDACNum[i] == ch and per.nEpochType[i] != 0]
            if dac.nWaveformSource[ch] == 2 and dac.nWaveformEnable[ch]:
                notes.append(f"command {ch} comes from a stimulus file, which is not read")
                continue
            if not epochs:
                continue
            holding = float(dac.fDACHoldingLevel[ch])
            if not (_finite(holding) and abs(holding) <= 1e6):
                notes.append(f"command {ch}: the header's holding level is invalid; 0 is used")
                holding = 0.0
            enabled = dac.nWaveformEnable[ch] == 1 and dac.nWaveformSource[ch] == 1
            units = abf.dacUnits[ch] if ch < len(abf.dacUnits) else ""
            names = abf.dacNames[ch] if ch < len(abf.dacNames) else ""
            out.append(CommandLayout(ch, _clean(units), _clean(names), holding, enabled,
                                     tuple(epochs), bool(dac.nInterEpisodeLevel[ch]),
                                     sweep_len))
        if any(x for x in (abf.userListEnable or []) if x):
            notes.append("a per-sweep user list varies a protocol value; command levels follow "
                         "the epoch table only and may be wrong for some sweeps (the recorded "
                         "command channel, if any, is right)")
    for c in out:
        if not c.enabled:
            notes.append(f"command {c.channel}: the protocol has epochs but the header says the "
                         f"waveform was not output; levels are the holding level only")
    return tuple(out)


def epoch_segments(cmd: CommandLayout, sweep: int, n: int) -> tuple[Segment, ...]:
    """Piecewise command of one sweep of ``n`` samples, built as the header library builds it.

    A holding part of n//64 samples comes first (the level of the previous sweep's end when the
    output keeps its last level), then each epoch with its per-sweep increments, then the rest
    at the holding (or last) level. Segments are clipped to the sweep; empty ones are dropped.
    """
    def last_level(k: int) -> float:
        if k < 0 or not cmd.keep_last_level:
            return cmd.holding
        return cmd.epochs[-1].level + cmd.epochs[-1].level_inc * k

    if not cmd.enabled:
        return (Segment(0, n, cmd.holding, "holding"),)
    raw: list[Segment] = []
    pre = cmd.sweep_length // 64
    raw.append(Segment(0, pre, last_level(sweep - 1), "holding"))
    pos = pre
    for e in cmd.epochs:
        dur = e.duration + e.duration_inc * sweep
        raw.append(Segment(pos, pos + dur, e.level + e.level_inc * sweep, e.kind,
                           e.period, e.width))
        pos += dur
    raw.append(Segment(pos, n, last_level(sweep), "holding"))
    out = []
    for s in raw:
        a, b = max(0, min(s.start, n)), max(0, min(s.stop, n))
        if b > a:
            out.append(Segment(a, b, s.level, s.kind, s.period, s.width))
    return tuple(out)


def read_layout(path: Path) -> Layout:
    """Check ``path`` and read its ABF header into a Layout; RecordingError on any bad file."""
    path = Path(path)
    size = check_file(path)
    head = _read_head(path, 8192)
    sig = head[:4]
    if sig not in (b"ABF ", b"ABF2"):
        shown = sig.decode("latin-1").encode("unicode_escape").decode("ascii")
        raise _err(path, "bad_signature", f"the file starts with {shown!r}, not 'ABF ' or "
                   f"'ABF2'; it is not an ABF recording (renamed, or another format)")
    notes: list[str] = []
    if sig == b"ABF2":
        _precheck_abf2(path, size, head)
    else:
        _precheck_abf1(path, size, head)
    abf = _open_pyabf(path, notes)
    try:
        return _layout(path, abf, head, size, notes)
    except RecordingError:
        raise
    except (Exception, MemoryError) as e:  # noqa: BLE001 - a header value pyabf accepted but we cannot use
        raise _err(path, "bad_header", f"the header has inconsistent values "
                   f"({type(e).__name__}: {str(e)[:120]}); the file is corrupt") from e


def _layout(path: Path, abf, head: bytes, size: int, notes: list[str]) -> Layout:
    major = abf.abfVersion["major"]
    n_ch = int(abf.channelCount)
    if major == 1:
        h = abf._headerV1
        mode = int(h.nOperationMode)
        interval_us = float(h.fADCSampleInterval) * n_ch
        old_abf1 = float(h.fFileVersionNumber) < 1.6 or h.lDataSectionPtr * 512 < 6144
        is_float = False
        if h.nNumPointsIgnored:
            notes.append(f"the header asks to skip {h.nNumPointsIgnored} points at the start; "
                         f"skipped as bytes, as the header library does")
    else:
        mode = int(abf._protocolSection.nOperationMode)
        interval_us = float(abf._protocolSection.fADCSequenceInterval)
        old_abf1 = False
        is_float = abf._headerV2.nDataFormat == 1
    if not (_finite(interval_us) and 0.01 <= interval_us <= 1e8):
        raise _err(path, "bad_header", f"the sample interval is {interval_us!r} us per channel "
                   f"(expected 0.01..1e8); the header is corrupt")
    fs = 1e6 / interval_us
    if abs(fs - round(fs)) > 1e-6:
        notes.append(f"the sample rate is not a whole number ({fs:.6g} Hz); the exact value "
                     f"from the sample interval is used")
    points = int(abf.dataPointCount)
    data_offset = int(abf.dataByteStart)
    itemsize = 4 if is_float else 2
    if data_offset < 512:
        raise _err(path, "bad_header", f"the samples would start at byte {data_offset}, inside "
                   f"the header (expected 512 or later); the header is corrupt")
    if points <= 0:
        raise _err(path, "bad_header", "the header declares no samples; the acquisition was "
                   "aborted or the file was closed before any data were written")
    end = data_offset + points * itemsize
    if end > size:
        raise _err(path, "truncated", f"the header implies data up to byte {end}, the file has "
                   f"{size}; it is still being written or was cut short")
    if points % n_ch:
        notes.append(f"{points} samples do not divide among {n_ch} channels; the last "
                     f"{points % n_ch} are ignored")
    n_per_ch = points // n_ch
    gap_free = mode == 3
    lengths, starts = _sweeps(path, abf, head, n_ch, n_per_ch, fs, gap_free, notes)
    if sum(lengths) > n_per_ch:  # defensive: never slice past the data
        raise _err(path, "bad_header", "the sweep lengths add up to more samples than the data "
                   "section holds; the header is corrupt")

    channels = []
    for i in range(n_ch):
        gain = 1.0 if is_float else float(abf._dataGain[i])
        offset = 0.0 if is_float else float(abf._dataOffset[i])
        if not (_finite(gain) and _finite(offset)) or gain == 0.0:
            raise _err(path, "bad_header", f"channel {i} has scale {gain!r} and offset "
                       f"{offset!r} (expected finite numbers, scale not 0); the header is corrupt")
        f_hz, f_src = _filter(abf, i, head, old_abf1)
        channels.append(ChannelLayout(i, _clean(abf.adcNames[i]), _clean(abf.adcUnits[i]),
                                      gain, offset, _rails(abf, gain, offset, is_float),
                                      f_hz, f_src))
    if is_float:
        notes.append("samples are stored as 32-bit floats already in channel units; there are "
                     "no converter rails")
    sweep_len = int(abf.sweepPointCount)
    commands = _commands(path, abf, head, n_ch, sweep_len, old_abf1, mode, notes)
    tags: list[tuple[float, str]] = []
    for t, c in zip(list(abf.tagTimesSec or []), list(abf.tagComments or [])):
        if _finite(t):
            tags.append((float(t), _clean(c)))
    return Layout(
        path=path, format=f"ABF{major}", version=str(abf.abfVersionString), file_size=size,
        data_offset=data_offset, dtype=np.dtype("<f4" if is_float else "<i2"), n_channels=n_ch,
        n_samples=n_per_ch, fs=fs, gap_free=gap_free, sweep_lengths=lengths,
        sweep_starts_s=starts, channels=tuple(channels), commands=commands,
        recorded_at=_date(path, abf, notes), tags=tuple(tags), notes=tuple(notes))
