"""Single-file formats through python-neo's rawio layer -> Recording, read in chunks.

neo picks its reader from the suffix (its own format detection); qcd takes the first signal
stream of the first block, segments as sweeps, and reads raw chunks with
get_analogsignal_chunk. Formats are named by suffix only. Imports neo (optional extra),
qcd.recording and qcd.errors.
"""
from __future__ import annotations

import contextlib
import errno
import io as _io
import warnings
from datetime import datetime
from pathlib import Path
from typing import Any

import numpy as np

from qcd.errors import RecordingError
from qcd.hdf5 import EXTRA_HINT
from qcd.recording import Channel, Header, Recording

__all__ = ["open_neo", "why_not_read"]
_MAX_SEGMENTS = 1_000_000
_MAX_CHANNELS = 4096


def _err(path: Path, kind: str, detail: str) -> RecordingError:
    return RecordingError(path, kind, detail)


def _said(e: BaseException, cls: type | None) -> str:
    """neo's message, one line, with its reader's class name replaced by a plain phrase."""
    text = " ".join(str(e).split())[:200]
    if cls is not None:
        text = text.replace(cls.__name__, "the reader")
    return f"{type(e).__name__}: {text}" if text else type(e).__name__


def _rawio(path: Path):
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            import neo.rawio
    except ImportError as e:
        raise _err(path, "unsupported", f"reading {path.suffix} files needs python-neo, from "
                   f"the optional formats extra: {EXTRA_HINT}") from e
    return neo.rawio


def _candidates(path: Path) -> list[type]:
    rawio = _rawio(path)
    found = rawio.get_rawio(path, exclusive_rawio=False) or []
    if not found:
        raise _err(path, "unsupported", f"python-neo has no reader for the suffix "
                   f"{path.suffix!r}")
    single = [c for c in found if getattr(c, "rawmode", "") == "one-file"]
    if not single:
        raise _err(path, "unsupported", f"python-neo reads {path.suffix} files together with "
                   f"companion files or a whole folder; qcd measures single-file formats only")
    return single


def why_not_read(path: Path) -> str | None:
    """Why a suffix qcd does not read is not read, when python-neo knows it; else None."""
    try:
        _candidates(path)
    except RecordingError as e:
        return e.detail if "companion" in e.detail else None
    return (f"python-neo reads {path.suffix} files, but not in bounded chunks or not checked "
            f"here; qcd measures {path.suffix} files only after conversion (to NWB, say)")


def _parse(path: Path, notes: list[str]) -> tuple[Any, type]:
    """Parse the header with the first of neo's candidate readers that can."""
    missing: list[str] = []
    last: tuple[BaseException, type] | None = None
    for cls in _candidates(path):
        printed = _io.StringIO()            # some readers print their oddities
        with warnings.catch_warnings(record=True) as caught, \
                contextlib.redirect_stdout(printed):
            warnings.simplefilter("always")
            try:
                io = cls(filename=str(path))
                io.parse_header()
            except ImportError as e:          # a reader needing a package that is not here
                missing.append(getattr(e, "name", None) or str(e)[:60])
                continue
            except FileNotFoundError as e:
                other = e.filename and Path(e.filename).resolve() != path.resolve()
                if other or e.errno == errno.ENOENT and str(path) not in str(e):
                    raise _err(path, "unsupported", f"python-neo needs a companion file "
                               f"beside it ({Path(str(e.filename or e)).name}), which is "
                               f"missing; qcd measures single-file formats only") from e
                raise _err(path, "unreadable", f"the file vanished while being read "
                           f"({_said(e, cls)})") from e
            except (Exception, MemoryError, RecursionError) as e:  # noqa: BLE001 - any parse failure
                last = (e, cls)
                continue
        for w in caught:
            notes.append(f"reader warning: {_said(w.message, cls)}")  # type: ignore[arg-type]
        for line in printed.getvalue().splitlines()[:20]:
            if line.strip():
                notes.append(f"reader said: {' '.join(line.split())[:200]}")
        return io, cls
    if last is not None:
        e, cls = last
        raise _err(path, "bad_header", f"python-neo could not parse it as a {path.suffix} "
                   f"file ({_said(e, cls)}); the file is corrupt, cut short or another "
                   f"format") from e
    raise _err(path, "unsupported", f"python-neo's reader for {path.suffix} needs packages "
               f"that are not installed ({', '.join(missing)})")


class _Source:
    """Chunks of one signal stream through get_analogsignal_chunk; holds the reader until closed."""

    def __init__(self, path: Path, io: Any, cls: type, stream: int,
                 lengths: tuple[int, ...], dtype: np.dtype) -> None:
        self._path, self._io, self._cls, self._stream = path, io, cls, stream
        self._offsets = np.concatenate(([0], np.cumsum(lengths))).astype(np.int64)
        self.dtype = dtype

    def read(self, a: int, b: int, channel: int | None) -> np.ndarray:
        if self._io is None:
            raise ValueError(f"{self._path}: recording is closed")
        chans = None if channel is None else [channel]
        parts = []
        k = int(np.searchsorted(self._offsets, a, side="right")) - 1
        pos = a
        while pos < b:
            base, end = int(self._offsets[k]), int(self._offsets[k + 1])
            lo, hi = pos - base, min(b, end) - base
            try:
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore")
                    x = self._io.get_analogsignal_chunk(block_index=0, seg_index=k,
                                                        i_start=lo, i_stop=hi,
                                                        stream_index=self._stream,
                                                        channel_indexes=chans)
            except (Exception, MemoryError) as e:  # noqa: BLE001 - any read failure
                raise _err(self._path, "unreadable", f"reading samples failed "
                           f"({_said(e, self._cls)}); the file changed or is damaged") from e
            parts.append(np.asarray(x, dtype=self.dtype).reshape(hi - lo, -1))
            pos, k = base + hi, k + 1
        out = parts[0] if len(parts) == 1 else np.concatenate(parts) if parts else \
            np.empty((0, 1 if channel is not None else 0), dtype=self.dtype)
        return out[:, 0].copy() if channel is not None else out

    def close(self) -> None:
        io, self._io = self._io, None
        for value in list(vars(io).values()) if io is not None else ():
            close = getattr(value, "close", None)
            if callable(close) and not isinstance(value, np.ndarray):
                try:
                    close()
                except Exception:  # noqa: BLE001 - releasing is best effort
                    pass


def _unit(text: str) -> str:
    u = text.replace("\x00", "").strip()
    return "?" if u in ("", "dimensionless") else u


def open_neo(path: Path) -> Recording:
    """Open a single-file format through python-neo; RecordingError for any bad file."""
    path = Path(path)
    notes: list[str] = []
    io, cls = _parse(path, notes)
    try:
        return _build(path, io, cls, notes)
    except RecordingError:
        _Source(path, io, cls, 0, (0,), np.dtype("f8")).close()
        raise
    except (Exception, MemoryError) as e:  # noqa: BLE001 - a header neo accepted but we cannot use
        _Source(path, io, cls, 0, (0,), np.dtype("f8")).close()
        raise _err(path, "bad_header", f"the header has values that cannot be used "
                   f"({_said(e, cls)}); the file is corrupt") from e


def _build(path: Path, io: Any, cls: type, notes: list[str]) -> Recording:
    h = io.header
    streams, sigs = h["signal_streams"], h["signal_channels"]
    if len(streams) == 0 or len(sigs) == 0:
        raise _err(path, "unsupported", "the file holds no continuous signals (only events or "
                   "spikes, or nothing); nothing to measure")
    if io.block_count() > 1:
        notes.append(f"{io.block_count()} blocks in the file; the first is measured")
    n_seg = int(io.segment_count(0))
    if not 1 <= n_seg <= _MAX_SEGMENTS:
        raise _err(path, "bad_header", f"{n_seg} segments (expected 1..{_MAX_SEGMENTS})")
    stream = 0
    if len(streams) > 1:
        left = ", ".join(str(s["name"]) for s in streams[1:])[:200]
        notes.append(f"signal stream {streams[0]['name']!r} is measured; other streams left "
                     f"out ({left})")
    mine = sigs[sigs["stream_id"] == streams[stream]["id"]]
    if not 1 <= len(mine) <= _MAX_CHANNELS:
        raise _err(path, "unsupported", f"{len(mine)} channels in the signal stream (expected "
                   f"1..{_MAX_CHANNELS})")
    fs = float(io.get_signal_sampling_rate(stream_index=stream))
    if not (np.isfinite(fs) and 0.0 < fs < 1e8):
        raise _err(path, "bad_header", f"sample rate {fs!r} Hz (expected 0..1e8)")
    lengths = tuple(int(io.get_signal_size(0, s, stream)) for s in range(n_seg))
    if sum(lengths) == 0:
        raise _err(path, "unsupported", "the signals hold no samples")
    t = [float(io.get_signal_t_start(0, s, stream)) for s in range(n_seg)]
    starts = tuple(x - t[0] for x in t)
    if any(b <= a for a, b in zip(starts, starts[1:])):
        notes.append("segment start times are not increasing; sweeps are taken back to back")
        starts = tuple(float(x) / fs for x in np.concatenate(([0], np.cumsum(lengths)[:-1])))
    dtypes = [np.dtype(str(d)) for d in mine["dtype"]]
    channels = []
    for c, row in enumerate(mine):
        gain, off = float(row["gain"]), float(row["offset"])
        if not (np.isfinite(gain) and np.isfinite(off)) or gain == 0.0:
            raise _err(path, "bad_header", f"channel {c} has scale {gain!r} and offset {off!r} "
                       f"(expected finite numbers, scale not 0)")
        rails = None
        if dtypes[c].kind in "iu":
            lim = np.iinfo(dtypes[c])
            lo, hi = lim.min * gain + off, lim.max * gain + off
            rails = (min(lo, hi), max(lo, hi))
        name = str(row["name"]).replace("\x00", "").strip() or f"channel {c}"
        channels.append(Channel(c, name, _unit(str(row["units"])), rails, None, gain, off))
    if any(ch.rails is not None for ch in channels):
        notes.append("converter rails taken as the limits of the stored integer type")
    when = None
    try:
        stamp = io.raw_annotations["blocks"][0].get("rec_datetime")
        when = stamp if isinstance(stamp, datetime) and 1980 <= stamp.year <= 2100 else None
    except (KeyError, IndexError, AttributeError, TypeError):
        pass
    if when is None:
        notes.append("the file states no usable start time; recorded_at is unknown")
    header = Header(path, f"neo {path.suffix.lower()}", _neo_version(), fs, n_seg == 1,
                    tuple(channels), lengths, starts, when, (), tuple(notes))
    dtype = np.result_type(*dtypes)
    return Recording(header, _Source(path, io, cls, stream, lengths, dtype), {})


def _neo_version() -> str:
    try:
        import neo
        return f"python-neo {neo.__version__}"
    except (ImportError, AttributeError):
        return "python-neo"
