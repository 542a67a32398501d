"""The format-neutral lazy reader: Recording, Channel, Command, Segment and open_recording().

A format module (qcd.abf) fills a plain Layout from the header; this module slices the data
section with short-lived numpy.memmap windows, one chunk at a time, and scales each chunk to
the channel's unit. Imports qcd.abf and qcd.errors.
"""
from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime
from pathlib import Path
from typing import Iterator

import numpy as np

from qcd import abf as _abf
from qcd.abf import Epoch, Layout, Segment
from qcd.errors import RecordingError

__all__ = ["Recording", "Channel", "Command", "Segment", "Epoch", "open_recording",
           "SUFFIXES"]

SUFFIXES = {".abf": _abf.read_layout}
_DEFAULT_CHUNK = 1 << 20


@dataclass(frozen=True)
class Channel:
    """One input channel; values are ``raw * gain + offset`` in ``unit``.

    ``rails`` are the converter limits in the channel unit (None for float samples);
    ``filter_hz`` is the low-pass setting the header records (``filter_source`` says whether
    it came from the amplifier's telegraph or a plain header field), None when unknown.
    """
    index: int
    name: str
    unit: str
    rails: tuple[float, float] | None
    filter_hz: float | None
    gain: float = 1.0
    offset: float = 0.0
    filter_source: str | None = None


@dataclass(frozen=True)
class Command:
    """The protocol command paired with input ``channel`` (command channel k drives input k).

    ``levels(sweep)`` gives the piecewise command over that sweep in samples, in ``unit``
    (mV or pA). ``enabled`` False means the header says the waveform was not output: levels
    are then the holding level only, while ``epochs`` still shows the protocol's table.
    """
    channel: int
    unit: str
    holding: float
    enabled: bool
    epochs: tuple[Epoch, ...]
    name: str
    _layout: _abf.CommandLayout
    _sweep_lengths: tuple[int, ...]

    def levels(self, sweep: int) -> tuple[Segment, ...]:
        if not 0 <= sweep < len(self._sweep_lengths):
            raise IndexError(f"sweep {sweep} not in 0..{len(self._sweep_lengths) - 1}")
        return _abf.epoch_segments(self._layout, sweep, self._sweep_lengths[sweep])

    def waveform(self, sweep: int) -> np.ndarray:
        """The command of one sweep as float64 samples (ramps linear, trains drawn)."""
        segs = self.levels(sweep)
        out = np.empty(self._sweep_lengths[sweep])
        before = segs[0].level if segs else self.holding
        for s in segs:
            n = s.stop - s.start
            part = out[s.start:s.stop]
            if s.kind == "ramp":
                part[:] = np.linspace(before, s.level, n)
            elif s.kind in ("pulse", "triangle", "cosine", "biphasic"):
                # a train between the previous level and ``level``; drawn as rectangular
                # pulses; without a period (ABF1 has none) there are no pulses at all
                part[:] = before
                for p in range(n // s.period if s.period > 0 else 0):
                    a = p * s.period
                    part[a:a + s.width] = s.level
            else:
                part[:] = s.level
            before = s.level
        return out


class Recording:
    """An open recording: header facts as attributes, samples read lazily in chunks.

    Use as a context manager or call ``close()``. No file handle or memory map stays open
    between read calls, so a writer can rename the file while the Recording exists.
    """

    def __init__(self, layout: Layout) -> None:
        self._lay = layout
        self.path: Path = layout.path
        self.format: str = layout.format
        self.version: str = layout.version
        self.fs: float = layout.fs
        self.gap_free: bool = layout.gap_free
        self.channels: tuple[Channel, ...] = tuple(
            Channel(c.index, c.name, c.unit, c.rails, c.filter_hz, c.gain, c.offset,
                    c.filter_source) for c in layout.channels)
        self.n_sweeps: int = len(layout.sweep_lengths)
        self.sweep_lengths: tuple[int, ...] = layout.sweep_lengths
        self.sweep_starts_s: tuple[float, ...] = layout.sweep_starts_s
        self.recorded_at: datetime | None = layout.recorded_at
        self.tags: tuple[tuple[float, str], ...] = layout.tags
        self.notes: list[str] = list(layout.notes)
        self.commands: dict[int, Command] = {
            c.channel: Command(c.channel, c.unit, c.holding, c.enabled, c.epochs, c.name, c,
                               layout.sweep_lengths)
            for c in layout.commands}
        self._offsets = np.concatenate(([0], np.cumsum(layout.sweep_lengths))).astype(np.int64)
        self._closed = False

    # -- facts
    @property
    def n_samples(self) -> int:
        """Samples per channel in all sweeps."""
        return int(self._offsets[-1])

    @property
    def duration_s(self) -> float:
        return self.n_samples / self.fs

    def __repr__(self) -> str:
        return (f"Recording({str(self.path)!r}, {self.format}, {len(self.channels)} ch, "
                f"{self.n_sweeps} sweeps, {self.fs:g} Hz)")

    # -- lifetime
    def close(self) -> None:
        self._closed = True

    def __enter__(self) -> "Recording":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # -- reading
    def _span(self, channel: int, sweep: int | None, start: int, stop: int | None
              ) -> tuple[int, int]:
        if self._closed:
            raise ValueError(f"{self.path}: recording is closed")
        if not 0 <= channel < len(self.channels):
            raise IndexError(f"channel {channel} not in 0..{len(self.channels) - 1}")
        if sweep is None:
            base, n = 0, self.n_samples
        else:
            if not 0 <= sweep < self.n_sweeps:
                raise IndexError(f"sweep {sweep} not in 0..{self.n_sweeps - 1}")
            base, n = int(self._offsets[sweep]), self.sweep_lengths[sweep]
        stop = n if stop is None else min(max(stop, 0), n)
        start = min(max(start, 0), stop)
        return base + start, base + stop

    def _raw_windows(self, channel: int, a: int, b: int, size: int
                     ) -> Iterator[np.ndarray]:
        """Views of the raw column over [a, b), each from its own short-lived memmap window.

        Mapping one window per chunk keeps resident memory at O(chunk) on a file of any size
        and leaves no map open between chunks.
        """
        lay = self._lay
        if size < 1:
            raise ValueError(f"chunk size must be at least 1, got {size}")
        row = lay.n_channels * lay.dtype.itemsize
        for s in range(a, b, size):
            e = min(s + size, b)
            try:
                mm = np.memmap(lay.path, dtype=lay.dtype, mode="r",
                               offset=lay.data_offset + s * row, shape=(e - s, lay.n_channels))
            except (OSError, ValueError) as err:
                raise RecordingError(lay.path, "unreadable", f"the samples could not be "
                                     f"mapped ({err}); the file changed or vanished while "
                                     f"being read") from err
            try:
                yield mm[:, channel]
            finally:
                del mm

    def raw_chunks(self, channel: int, sweep: int | None = None, size: int = _DEFAULT_CHUNK,
                   *, start: int = 0, stop: int | None = None) -> Iterator[np.ndarray]:
        """Unscaled samples (int16 or float32 copies) in chunks of at most ``size``."""
        a, b = self._span(channel, sweep, start, stop)
        for view in self._raw_windows(channel, a, b, size):
            yield np.array(view)

    def chunks(self, channel: int, sweep: int | None = None, size: int = _DEFAULT_CHUNK,
               *, start: int = 0, stop: int | None = None) -> Iterator[np.ndarray]:
        """Samples in the channel's unit as float64 arrays of at most ``size`` samples.

        ``sweep=None`` runs over all sweeps back to back; ``start``/``stop`` are sample
        indices within the sweep (or the whole channel).
        """
        a, b = self._span(channel, sweep, start, stop)
        ch = self.channels[channel]
        gain, offset = ch.gain, ch.offset
        for view in self._raw_windows(channel, a, b, size):
            with np.errstate(all="ignore"):  # float samples may hold NaN/inf: passed through
                # a plain cast, then scale in place: measured faster than a mixed-type
                # multiply, a lookup table or cache-sized blocks
                out = view.astype(np.float64)
                if gain != 1.0:
                    out *= gain
                if offset != 0.0:
                    out += offset
            yield out

    def sweep(self, channel: int, k: int) -> np.ndarray:
        """Sweep ``k`` of ``channel`` as one float64 array in the channel's unit."""
        n = self.sweep_lengths[k] if 0 <= k < self.n_sweeps else 0
        parts = list(self.chunks(channel, k, size=max(n, 1)))
        return parts[0] if len(parts) == 1 else np.concatenate(parts) if parts else \
            np.empty(0)


def open_recording(path: str | Path) -> Recording:
    """Open a recording by its suffix (.abf); RecordingError for any bad or unknown file."""
    p = Path(path)
    reader = SUFFIXES.get(p.suffix.lower())
    if reader is None:
        known = ", ".join(sorted(SUFFIXES))
        raise RecordingError(p, "unsupported", f"the suffix {p.suffix or '(none)'!r} is not a "
                             f"recording format qcd reads (expected {known})")
    return Recording(reader(p))
