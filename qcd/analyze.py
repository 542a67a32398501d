"""Recording -> FileMeasures (qcd.results): one pass over the samples, every channel at once.

What to measure comes from qcd.plan (mode, test steps, baseline windows), the block statistics
and spectrum from qcd.blocks, the test pulse from qcd.pulse. Windows: gap-free files in 1 s
blocks (events: block RMS > 3x median, left out and counted), all channels' blocks from one read
of each chunk; episodic files before the first command change (the spectrum also after the
return to holding). ``baseline_blocks`` gives one channel's baseline blocks as the spectrum
takes them (compare). Imports qcd.plan, qcd.blocks, qcd.pulse, qcd.recording, qcd.measures,
qcd.results, qcd.units, qcd.errors.
"""
from __future__ import annotations

import functools
import logging
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np

from qcd import units
from qcd.blocks import MAX_HUM_DF, Blocks, put, spectral
from qcd.errors import RecordingError
from qcd.measures import drift, humfit, zoom
from qcd.measures import noise as nz
from qcd.measures import spectrum as sp
from qcd.plan import Dims, StepPlan, plan_file
from qcd.pulse import PulseRun, pulse_measures
from qcd.recording import open_recording
from qcd.results import ChannelMeasures, FileMeasures, Measure

__all__ = ["analyze", "analyze_path", "Baseline", "baseline_blocks"]

log = logging.getLogger("qcd.analyze")

_BLOCK_S = 1.0            # gap-free baseline blocks (DESIGN)
_MIN_BLOCK = 16           # fewer baseline samples than this per window: no noise measures
# A gap-free file of at least this many samples (all channels; 3.5 min at 20 kHz) has its
# integer samples transformed in float32 (qcd.measures.spectrum.BlockFFT's single path: about
# 2 ns less per sample, a third of the passes' time); shorter files, where the time is small
# anyway, stay in float64 and agree with the time-domain references to 1e-10.
_SINGLE_MIN_SAMPLES = 1 << 22


class _Run:
    """One channel's measuring: set up from the plan, fed samples, then ``result()``.

    Gap-free files are fed raw converter counts chunk by chunk (``feed``), so that every
    channel's blocks come from one read of the file (``_gap_free_pass``); episodic files read
    their sweeps one by one (``sweeps``)."""

    def __init__(self, rec: Any, c: int, dims: Dims, mode: str, plan: StepPlan | None,
                 windows: list[list[tuple[int, int]]], mains_hz: float | None,
                 shared: dict | None = None) -> None:
        self.rec, self.c, self.mode, self.plan, self.windows = rec, c, mode, plan, windows
        self.mains_hz = mains_hz
        self.ch = ch = rec.channels[c]
        self.dim, self.factor = dims.dim[c], dims.factor[c]
        fs = rec.fs
        self.n_total = self.clipped = 0
        self.tpr = None
        if plan is not None and plan.ok:
            self.tpr = PulseRun(mode, plan, ch, self.factor, fs, rec.n_sweeps)
        acc: Blocks | None
        if rec.gap_free:
            L = max(1, min(int(round(fs * _BLOCK_S)), rec.n_samples))
            gain, offset = ch.gain, ch.offset
            raw_rails = None
            if ch.rails is not None and gain != 0:
                raw_rails = tuple(sorted(((ch.rails[0] - offset) / gain,
                                          (ch.rails[1] - offset) / gain)))
            single = rec.n_samples * len(rec.channels) >= _SINGLE_MIN_SAMPLES
            acc = Blocks(L, fs, gain * self.factor, offset * self.factor, raw_rails,
                          single=single, reread=self._reread, shared=shared) \
                if L >= _MIN_BLOCK else None
            acc_s = acc
            self.L = L
        else:
            # time-domain noise from the pre-step windows (DESIGN); the spectrum from every
            # stretch at holding, so a long holding tail gives the resolution hum needs
            one_s = int(round(fs * _BLOCK_S))
            pre = [w[0][1] - w[0][0] for w in windows if w]
            usable = [n for n in pre if n >= _MIN_BLOCK]
            L = min([one_s] + usable) if usable else 0
            L2 = min(one_s, max((b - a for w in windows for a, b in w), default=0))
            acc = Blocks(L, fs) if L >= _MIN_BLOCK else None
            same = L2 == L and all(len(w) == 1 for w in windows)
            acc_s = acc if same else (Blocks(L2, fs) if L2 >= _MIN_BLOCK else None)
            if (acc_s is not None and mains_hz and fs / acc_s.L > MAX_HUM_DF
                    and humfit.HumFit.fits(acc_s.L, fs, mains_hz)):
                acc_s.humfit = humfit.HumFit(acc_s.L, fs, mains_hz)
        if acc_s is not None and fs / acc_s.L <= MAX_HUM_DF and fs / 2 > 75.0:
            acc_s.lines = zoom.LineBins(acc_s.L, fs, (mains_hz,) if mains_hz else (50.0, 60.0),
                                         scale=acc_s.scale)
        self.acc, self.acc_s = acc, acc_s
        self._left: np.ndarray | None = None
        self._done = 0

    def _reread(self, starts: np.ndarray) -> np.ndarray:
        """Raw blocks of a gap-free channel that begin at ``starts``, read again from the file
        (the event blocks the PSD leaves out)."""
        L = self.L
        rows = [np.concatenate(list(self.rec.raw_chunks(self.c, None, size=L, start=int(s),
                                                        stop=int(s) + L)))
                for s in starts]
        if any(len(r) != L for r in rows):
            raise RecordingError(self.rec.path, "unreadable", "a block could not be read "
                                 "again: the file changed while being read")
        return np.stack(rows)

    def feed(self, x: np.ndarray) -> None:
        """The next raw samples of a gap-free channel (converter counts or stored floats);
        gain, offset and the SI factor are applied to the results (every measure is linear
        in the samples or offset-free)."""
        ch, acc = self.ch, self.acc
        self.n_total += len(x)
        if acc is None:
            self.clipped += nz.clipping_count(x * ch.gain + ch.offset, ch.rails)
            return
        L, left = acc.L, self._left
        if left is not None and len(left):
            x = np.concatenate((left, x))
        nb = len(x) // L
        if nb:
            t0 = (self._done + np.arange(nb) * L + L / 2) / self.rec.fs
            self._left = x[nb * L:].copy()
            acc.add(x[:nb * L].reshape(nb, L), t0)
            self._done += nb * L
        else:
            self._left = x.copy()

    def sweeps(self) -> None:
        """Read and measure every sweep of an episodic channel."""
        rec, acc, acc_s, fs = self.rec, self.acc, self.acc_s, self.rec.fs
        for k in range(rec.n_sweeps):
            x = rec.sweep(self.c, k)
            self.n_total += len(x)
            self.clipped += nz.clipping_count(x, self.ch.rails)
            xs = x * self.factor
            if self.tpr is not None:
                self.tpr.add(k, xs)
            t_k = rec.sweep_starts_s[k]
            for target, wins in ((acc, self.windows[k][:1]),
                                 (None if acc_s is acc else acc_s, self.windows[k])):
                if target is None:
                    continue
                n_l = target.L
                for a, b in wins:
                    nb = (b - a) // n_l
                    if nb:
                        t0 = t_k + (a + np.arange(nb) * n_l + n_l / 2) / fs
                        target.add(xs[a:a + nb * n_l].reshape(nb, n_l).copy(), t0,
                                   a + np.arange(nb) * n_l, k)

    def result(self) -> ChannelMeasures:
        ch, acc, acc_s, dim = self.ch, self.acc, self.acc_s, self.dim
        rec, fs, rails, plan = self.rec, self.rec.fs, self.ch.rails, self.plan
        notes: list[str] = []
        out: dict[str, Measure] = {}
        clipped = self.clipped
        if rec.gap_free and acc is not None:
            clipped += acc.clipped
            if self._left is not None and len(self._left):
                clipped += nz.clipping_count(self._left * ch.gain + ch.offset, rails)
        spectrum = None
        for a_ in {id(acc): acc, id(acc_s): acc_s}.values():
            if a_ is not None and a_.nonfinite:
                notes.append(f"{a_.nonfinite} baseline windows hold NaN or infinite samples "
                             f"and were left out")
        if acc is None or not acc.parts["sd"]:
            notes.append("no baseline window long enough for noise measures "
                         f"(need {_MIN_BLOCK} samples at the holding level)")
        elif _all_flat(acc):
            self._flat(acc, out, notes)
            if acc_s is acc or _all_flat(acc_s):
                acc_s = None              # a spectrum of one value is only rounding
        else:
            a = acc.arrays()
            events = nz.event_blocks(a["sd"])
            keep = ~events
            if rec.gap_free or len(a["sd"]) >= 3:
                out["event_blocks"] = Measure("event_blocks", int(events.sum()), "")
            put(out, "noise_rms", float(nz.median(a["sd"][keep])), dim)
            put(out, "noise_rms_1k", float(nz.median(a["sd_band"][keep])), dim)
            if fs / 2 <= 1000.0:
                notes.append(f"noise_rms_1k: the file's bandwidth ({fs / 2:g} Hz Nyquist) is "
                             f"already below 1 kHz")
            pp = float(nz.median(a["pp"][keep]))
            put(out, "noise_pp", pp, dim)
            rms = float(nz.median(a["sd"][keep]))
            if rms > 0:
                out["pp_over_rms"] = Measure("pp_over_rms", pp / rms, "")
            put(out, "holding", float(np.mean(a["mean"][keep])), dim)
            slope = drift.baseline_drift(a["t"][keep], a["median"][keep])
            if slope is not None:
                put(out, "baseline_drift", slope, {"A": "A/s", "V": "V/s"}.get(dim, ""))
            else:
                notes.append("baseline_drift: baseline spans less than 1 s or fewer than 3 "
                             "windows")
        if acc_s is not None and acc_s.parts["sd"]:
            s_events = nz.event_blocks(np.concatenate(acc_s.parts["sd"]))
            spectrum = spectral(acc_s, s_events, fs, dim, self.mains_hz, out, notes)
        if rails is not None and self.n_total:
            out["clipping_fraction"] = Measure("clipping_fraction", clipped / self.n_total, "")
        elif rails is None:
            notes.append("clipping_fraction: converter rails unknown (float samples)")
        if self.tpr is not None:
            notes.append(f"test step from the {plan.source}")
            pulse_measures(self.tpr, out, notes)
        elif plan is not None and plan.reason:
            notes.append(plan.reason)
        return ChannelMeasures(ch.index, ch.name, ch.unit.replace("\x00", "").strip() or "?",
                               dim, out, tuple(notes), spectrum)


    def _flat(self, acc: Blocks, out: dict[str, Measure], notes: list[str]) -> None:
        """Every baseline window holds one value (an input not connected, a converter at a
        rail): holding that value and exact zeros for noise, no spectral measures."""
        a = acc.arrays()
        value = float(nz.median(a["mean"]))
        if self.rec.gap_free:
            out["event_blocks"] = Measure("event_blocks", 0, "")
        put(out, "holding", value, self.dim)
        for name in ("noise_rms", "noise_rms_1k", "noise_pp"):
            put(out, name, 0.0, self.dim)
        unit = out["holding"].unit if "holding" in out else ""
        shown = out["holding"].value if "holding" in out else value
        notes.append(f"the samples do not change: every baseline window holds the one value "
                     f"{shown:.6g}{' ' + unit if unit else ''} (an input not connected or a "
                     f"signal at a converter rail?); noise is 0 and there is no spectrum, so "
                     f"no hum, bands, corner or lines")


def _all_flat(acc: Blocks | None) -> bool:
    """Every block the accumulator took holds one value."""
    return acc is not None and acc.flat == sum(len(v) for v in acc.parts["sd"]) > 0


@functools.cache
def _keep_freed_memory() -> None:
    """Once per process, on glibc: memory a chunk's temporaries free (the transform's own
    work arrays, a few hundred kB each) stays with the process for the next chunk instead of
    going back to the kernel, to be faulted in and zeroed again (mmap threshold 64 MB, trim
    threshold 128 MB; measured on a 30-minute file: 20k -> 9k page faults, 4 % less time).
    Memory held stays within the peak of one file; elsewhere nothing changes."""
    import ctypes
    try:
        libc = ctypes.CDLL(None)
        if hasattr(libc, "gnu_get_libc_version"):
            libc.mallopt(-3, 64 << 20)          # M_MMAP_THRESHOLD
            libc.mallopt(-1, 128 << 20)         # M_TRIM_THRESHOLD
    except (OSError, TypeError, AttributeError):
        pass


def _gap_free_pass(rec: Any, runs: list[_Run], chunk: int) -> None:
    """One read of a gap-free file for every channel: chunks of whole blocks (about ``chunk``
    samples over all channels), each channel's column fed to its run."""
    if rec.n_samples * len(runs) >= _SINGLE_MIN_SAMPLES:
        _keep_freed_memory()
    L = max(r.L for r in runs)
    # rows per read: ``chunk`` for one channel; with more, up to 4x ``chunk`` samples in all
    # (8 MB of 16-bit samples), so each channel still gets many blocks per call
    per = max(L, min(chunk, 4 * chunk // len(runs)) // L * L)
    if len(runs) == 1:
        for x in rec.raw_chunks(0, None, size=per, reuse=True):
            runs[0].feed(x)
        return
    cols: np.ndarray | None = None
    for x in rec.raw_chunks_all(None, size=per, reuse=True):
        cols = _by_channel(x, cols)
        for c, r in enumerate(runs):
            r.feed(cols[c, :len(x)])


def _by_channel(x: np.ndarray, out: np.ndarray | None) -> np.ndarray:
    """The (n, channels) chunk as (channels, n) rows, in a reused buffer. Transposed in tiles
    of about 64 k samples, which stay in cache: a column at a time reads the whole chunk once
    per channel (measured 4x slower for 16 channels)."""
    n, k = x.shape
    if out is None or out.shape[1] < n or out.dtype != x.dtype:
        out = np.empty((k, n), dtype=x.dtype)
    t = max(512, (1 << 16) // max(k, 1))
    for a in range(0, n, t):
        out[:, a:min(a + t, n)] = x[a:a + t].T
    return out


def analyze(recording: Any, *, pulse: Any = None, mains_hz: float | None = None,
            mode: str | None = None, chunk_size: int = 1 << 20) -> FileMeasures:
    """Measure an open Recording (one pass over its samples).

    ``pulse`` (qcd.config.TestPulse) is used when neither the protocol nor a recorded command
    shows a test step; ``mains_hz`` (50/60) skips the 50-vs-60 detection; ``mode`` (one of
    qcd.config.DECLARED_MODES) is the rig's recording mode for headers that cannot tell;
    ``chunk_size`` is the reader's chunk length for gap-free files (results do not depend on
    it).
    """
    rec = recording
    notes: list[str] = list(rec.notes)
    dims, mode, primary, plans, windows = plan_file(rec, pulse, notes, mode)
    shared: dict = {}           # the channels' work buffers, fed one after the other
    runs = [_Run(rec, c, dims, mode, plans.get(c), windows, mains_hz, shared)
            for c in range(len(rec.channels))]
    if rec.gap_free and runs:
        _gap_free_pass(rec, runs, chunk_size)
    else:
        for r in runs:
            r.sweeps()
    channels = tuple(r.result() for r in runs)
    return FileMeasures(
        path=str(rec.path), status="ok", mode=mode, format=rec.format, fs_hz=float(rec.fs),
        duration_s=float(rec.duration_s), n_sweeps=int(rec.n_sweeps),
        gap_free=bool(rec.gap_free), recorded_at=rec.recorded_at, channels=channels,
        notes=tuple(notes), extra={"primary_channel": primary})


def _file_facts(p: Path, digest: bool) -> dict[str, Any]:
    facts: dict[str, Any] = {}
    try:
        st = p.stat()
        facts.update(size=int(st.st_size), mtime=float(st.st_mtime))
        if digest and p.is_file():
            import hashlib                  # here: qcd scan without --store has no digest
            h = hashlib.sha256()
            with open(p, "rb") as f:
                for block in iter(lambda: f.read(1 << 22), b""):
                    h.update(block)
            facts["sha256"] = h.hexdigest()
    except OSError:
        pass
    return facts


def analyze_path(path: Any, *, pulse: Any = None, mains_hz: float | None = None,
                 mode: str | None = None, digest: bool = True,
                 chunk_size: int = 1 << 20, recording: Any = None) -> FileMeasures:
    """Open, measure and close one file. A bad file gives status 'error' instead of raising.

    ``digest`` computes the file's sha256 (for the store's duplicate check); ``qcd scan``
    without ``--store`` skips it. ``recording``: the file's header already read (by intake).
    Any other exception is a bug in qcd: ``pipeline.measure`` stores it as 'internal'.
    """
    p = Path(path)
    facts = _file_facts(p, digest)
    try:
        with (recording if recording is not None else open_recording(p)) as rec:
            fm = analyze(rec, pulse=pulse, mains_hz=mains_hz, mode=mode,
                         chunk_size=chunk_size)
    except RecordingError as e:
        return FileMeasures(path=str(p), status="error", error=str(e), error_kind=e.kind,
                            **facts)
    return replace(fm, **facts)


@dataclass(frozen=True)
class Baseline:
    """One channel's baseline as blocks of equal length: the stretches analyze takes its
    spectrum from (gap-free: 1 s blocks; episodic: the windows at the holding level), blocks
    that hold events left out."""
    fs: float
    dimension: str                   # 'A', 'V' or '' (qcd.units.channel_quantity)
    unit: str                        # the blocks' unit: the display unit, else the channel's
    blocks: np.ndarray               # (n, L)
    events: int                      # blocks left out because they hold events
    notes: tuple[str, ...] = ()


def baseline_blocks(rec: Any, channel: int, *, pulse: Any = None,
                    max_blocks: int | None = None) -> Baseline:
    """The baseline blocks of one channel of an open Recording, in its display unit.

    The windows and block length are analyze's own (``pulse`` as for ``analyze``); at most
    ``max_blocks`` blocks are read from a gap-free file, so a long file is not read whole.
    """
    notes: list[str] = []
    dims, _, _, _, windows = plan_file(rec, pulse, notes)
    dim, factor = dims.dim[channel], dims.factor[channel]
    unit = units.DISPLAY[dim] if dim else (rec.channels[channel].unit.replace("\x00", "").strip())
    scale = factor / units.FACTORS[unit] if dim else 1.0
    fs = rec.fs
    rows: list[np.ndarray] = []
    if rec.gap_free:
        L = max(1, min(int(round(fs * _BLOCK_S)), rec.n_samples))
        left = np.empty(0)
        for x in rec.chunks(channel, None, size=max(L, (1 << 20) // L * L)):
            x = np.concatenate((left, x)) if len(left) else x
            nb = len(x) // L
            if max_blocks is not None:
                nb = min(nb, max_blocks - sum(len(r) for r in rows))
            rows.append(x[:nb * L].reshape(nb, L))
            left = x[nb * L:]
            if max_blocks is not None and sum(len(r) for r in rows) >= max_blocks:
                break
    else:
        L = min(int(round(fs * _BLOCK_S)), max((b - a for w in windows for a, b in w), default=0))
        for k, wins in enumerate(windows):
            x = rec.sweep(channel, k) if L >= _MIN_BLOCK else np.empty(0)
            for a, b in wins:
                nb = (b - a) // L if L >= _MIN_BLOCK else 0
                if nb:
                    rows.append(x[a:a + nb * L].reshape(nb, L))
    blocks = np.concatenate(rows) * scale if rows else np.empty((0, max(L, 0)))
    blocks = blocks[np.isfinite(blocks).all(axis=1)]
    events = 0
    if len(blocks):
        X, _, _ = sp.block_fft(blocks)
        sd, _ = nz.parseval_sd(X, blocks.shape[1], fs)
        keep = ~nz.event_blocks(sd)
        events = int((~keep).sum())
        blocks = blocks[keep]
    return Baseline(float(fs), dim, unit, blocks, events, tuple(notes))

