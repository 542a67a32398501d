"""NWB (HDF5) -> Recording through h5py, lazily, following pynwb's layout of the standard.

Intracellular: PatchClampSeries (voltage and current clamp) per electrode and sweep, their
stimulus series as the command. Extracellular: ElectricalSeries columns as channels. Samples are
read as HDF5 hyperslabs of one chunk; the file is opened per read and never locked, so the
writer is never blocked. Imports h5py (optional extra), qcd.hdf5, qcd.recording, qcd.errors.
"""
from __future__ import annotations

from collections import defaultdict
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path
from typing import Any

import numpy as np

from qcd.errors import RecordingError
from qcd.hdf5 import check_end, h5py_module
from qcd.recording import Channel, Header, Recording, SampledCommand

__all__ = ["open_nwb"]

_MAX_SERIES = 100_000            # response series (sweeps x electrodes) in one file
_MAX_CHANNELS = 4096             # columns of the extracellular series taken together
_MAX_CHUNK_BYTES = 64 << 20      # one HDF5 chunk is decompressed whole: cap it
_RATE_RTOL = 1e-6
# data unit -> (qcd unit, factor from the NWB unit)
_UNITS = {"amperes": ("pA", 1e12), "volts": ("mV", 1e3)}
_UNIT_FACTOR = {u: k for u, k in _UNITS.values()}
_VC = {"VoltageClampSeries"}
_CC = {"CurrentClampSeries", "IZeroClampSeries"}


def _err(path: Path, kind: str, detail: str) -> RecordingError:
    return RecordingError(path, kind, detail)


def _h5py(path: Path):
    return h5py_module(path)


# ------------------------------------------------------------------------------- layout

@dataclass(frozen=True)
class _Piece:
    """Samples [start, start + n) of the dataset ``data`` (1-D, or column ``col`` of 2-D)."""
    data: str
    start: int
    n: int
    gain: float                  # stored value * gain + offset = value in the channel unit
    offset: float
    rate: float
    t0: float
    col: int | None = None


def _text(value: Any) -> str:
    if isinstance(value, bytes):
        return value.decode("utf-8", "replace")
    if isinstance(value, np.ndarray) and value.size == 1:
        return _text(value.reshape(-1)[0])
    return str(value)


def _attr(obj: Any, name: str, default: Any = None) -> Any:
    try:
        return obj.attrs.get(name, default)
    except (OSError, KeyError, ValueError, TypeError):
        return default


def _float(value: Any, default: float) -> float:
    try:
        v = float(np.asarray(value).reshape(-1)[0])
    except (TypeError, ValueError, IndexError):
        return default
    return v if np.isfinite(v) else default


def _time(path: Path, grp: Any, n: int, notes: list[str]) -> tuple[float, float]:
    """(rate in Hz, starting time in s) from starting_time or timestamps (first 4096 read)."""
    name = grp.name
    if "starting_time" in grp:
        st = grp["starting_time"]
        rate = _float(_attr(st, "rate"), 0.0)
        t0 = _float(st[()], 0.0)
    elif "timestamps" in grp:
        ts = grp["timestamps"]
        if ts.ndim != 1 or len(ts) < 2:
            raise _err(path, "bad_header", f"{name}: timestamps hold fewer than 2 values; the "
                       f"sample rate cannot be known")
        head = np.asarray(ts[:min(len(ts), 4096)], dtype=np.float64)
        t0, last = float(head[0]), float(ts[len(ts) - 1])
        rate = (len(ts) - 1) / (last - t0) if last > t0 else 0.0
        d = np.diff(head)
        if rate > 0 and np.any(np.abs(d * rate - 1.0) > 0.01):
            notes.append(f"{name}: timestamps are not evenly spaced; the sample rate "
                         f"{rate:.6g} Hz is their average")
    else:
        raise _err(path, "bad_header", f"{name}: neither starting_time nor timestamps; the "
                   f"sample times are unknown")
    if not (0.0 < rate < 1e8):
        raise _err(path, "bad_header", f"{name}: sample rate {rate!r} Hz (expected 0..1e8); "
                   f"the series is corrupt")
    return rate, t0


def _dataset(path: Path, grp: Any, ndim: tuple[int, ...]) -> Any:
    h5py = _h5py(path)
    d = grp.get("data")
    if not isinstance(d, h5py.Dataset) or d.ndim not in ndim or d.dtype.kind not in "iuf":
        raise _err(path, "bad_header", f"{grp.name}: its data is not a numeric array of "
                   f"{' or '.join(map(str, ndim))} dimensions")
    if d.chunks is not None:
        chunk = int(np.prod(d.chunks)) * d.dtype.itemsize
        if chunk > _MAX_CHUNK_BYTES:
            raise _err(path, "unsupported", f"{d.name}: HDF5 chunks of {chunk >> 20} MB (at "
                       f"most {_MAX_CHUNK_BYTES >> 20} MB can be read in bounded memory)")
    return d


def _piece(path: Path, grp: Any, notes: list[str], start: int = 0, count: int = -1,
           col: int | None = None, extra_gain: float = 1.0) -> tuple[_Piece, str, Any]:
    d = _dataset(path, grp, (1,) if col is None else (1, 2))
    nwb_unit = _text(_attr(d, "unit", "")).strip()
    unit, factor = _UNITS.get(nwb_unit, (nwb_unit or "?", 1.0))
    conv = _float(_attr(d, "conversion", 1.0), 1.0) * extra_gain
    off = _float(_attr(d, "offset", 0.0), 0.0)
    n_all = int(d.shape[0])
    start = max(0, min(int(start), n_all))
    n = n_all - start if count is None or count < 0 else max(0, min(int(count), n_all - start))
    rate, t0 = _time(path, grp, n_all, notes)
    return _Piece(d.name, start, n, conv * factor, off * factor, rate, t0 + start / rate,
                  col), unit, d


# -------------------------------------------------------------------------- intracellular

def _electrode(grp: Any) -> str:
    import h5py
    link = grp.get("electrode", getlink=True)
    if isinstance(link, h5py.SoftLink):
        return link.path
    return grp["electrode"].name


def _is_icephys(grp: Any) -> bool:
    return "electrode" in grp and "data" in grp


def _is_ecephys(grp: Any) -> bool:
    return "electrodes" in grp and "data" in grp


def _series(f: Any, where: str, test) -> list[Any]:
    import h5py
    out: list[Any] = []
    top = f.get(where)
    if not isinstance(top, h5py.Group):
        return out
    for obj in top.values():
        if not isinstance(obj, h5py.Group):
            continue
        if test(obj):
            out.append(obj)
        else:                              # one level of containers (e.g. LFP)
            out.extend(o for o in obj.values() if isinstance(o, h5py.Group) and test(o))
        if len(out) > _MAX_SERIES:
            raise RecordingError(f.filename, "bad_header", f"more than {_MAX_SERIES} series "
                                 f"under {where}; the file is corrupt or not one recording")
    return out


def _kind(grp: Any) -> str:
    t = _text(_attr(grp, "neurodata_type", ""))
    if t in _VC:
        return "VC"
    if t in _CC:
        return "CC"
    unit = _text(_attr(grp["data"], "unit", ""))
    return "VC" if unit == "amperes" else "CC"


def _table_entries(path: Path, f: Any, notes: list[str]) -> list[tuple] | None:
    """(electrode, sweep key, response group, start, count, stimulus (group, start, count) or
    None) per row of the intracellular recordings table; None when there is no such table."""
    ic = f.get("general/intracellular_ephys/intracellular_recordings")
    if ic is None or "responses" not in ic or "response" not in ic["responses"]:
        return None
    for column in ("responses/response", "stimuli/stimulus"):   # sizes before any read
        if column in ic and len(ic[column]) > _MAX_SERIES:
            raise _err(path, "bad_header", f"the intracellular recordings table has "
                       f"{len(ic[column])} rows (at most {_MAX_SERIES})")
    resp = ic["responses/response"][()]
    stim = ic["stimuli/stimulus"][()] if "stimuli" in ic and "stimulus" in ic["stimuli"] \
        else None
    sweep_of_row: dict[int, int] = {}
    sim = f.get("general/intracellular_ephys/simultaneous_recordings")
    if sim is not None and "recordings" in sim and "recordings_index" in sim:
        if max(len(sim["recordings"]), len(sim["recordings_index"])) > _MAX_SERIES:
            raise _err(path, "bad_header", f"the simultaneous recordings table has more "
                       f"than {_MAX_SERIES} rows")
        rows = sim["recordings"][()]
        ends = sim["recordings_index"][()]
        a = 0
        for k, b in enumerate(ends):
            for r in rows[a:int(b)]:
                sweep_of_row[int(r)] = k
            a = int(b)
    out = []
    for i, (s0, cnt, ref) in enumerate(resp):
        if not ref:
            continue
        grp = f[ref]
        st = None
        if stim is not None and stim[i][2] and int(stim[i][1]) >= 0:
            st = (f[stim[i][2]], int(stim[i][0]), int(stim[i][1]))
        number = _attr(grp, "sweep_number")
        key = sweep_of_row.get(i, int(number) if number is not None else i)
        out.append((_electrode(grp), key, grp, int(s0), int(cnt), st))
    notes.append("sweeps from the intracellular recordings table")
    return out


def _sweep_entries(path: Path, f: Any, responses: list[Any], notes: list[str]) -> list[tuple]:
    """The same entries from sweep numbers, else from the order of the series in time."""
    stims: dict[tuple[str, Any], Any] = {}
    for g in _series(f, "stimulus/presentation", _is_icephys):
        stims[(_electrode(g), _attr(g, "sweep_number"))] = g
    numbered = all(_attr(g, "sweep_number") is not None for g in responses)
    out = []
    if numbered:
        notes.append("sweeps from the series' sweep numbers")
        for g in responses:
            n = _attr(g, "sweep_number")
            el = _electrode(g)
            st = stims.get((el, n))
            out.append((el, int(n), g, 0, -1, (st, 0, -1) if st is not None else None))
        return out
    notes.append("no sweep numbers: each series of an electrode is one sweep, in time order")
    by_el: dict[str, list[Any]] = defaultdict(list)
    for g in responses:
        by_el[_electrode(g)].append(g)
    for el, gs in by_el.items():
        gs.sort(key=lambda g: _time(path, g, 0, [])[1])
        for k, g in enumerate(gs):
            out.append((el, k, g, 0, -1, None))
    return out


def _intracellular(path: Path, f: Any, responses: list[Any], notes: list[str]):
    entries = _table_entries(path, f, notes)
    if entries is None:
        entries = _sweep_entries(path, f, responses, notes)
    groups: dict[tuple[str, str], dict[Any, tuple]] = defaultdict(dict)
    for el, key, grp, s0, cnt, st in entries:
        groups[(el, _kind(grp))][key] = (grp, s0, cnt, st)
    if not groups:
        raise _err(path, "unsupported", "the intracellular recordings table lists no response")
    primary = max(groups, key=lambda k: len(groups[k]))
    sweeps = sorted(groups[primary])
    kept = [k for k in sorted(groups) if set(sweeps) <= set(groups[k])]
    for k in sorted(groups):
        if k not in kept:
            notes.append(f"electrode {k[0].rsplit('/', 1)[-1]} ({k[1]}) left out: it lacks some "
                         f"of the {len(sweeps)} sweeps of the main electrode")
        elif len(groups[k]) > len(sweeps):
            notes.append(f"{len(groups[k]) - len(sweeps)} sweeps of electrode "
                         f"{k[0].rsplit('/', 1)[-1]} without a partner on the main electrode "
                         f"left out")
    pieces: list[list[_Piece]] = []
    stims: list[list[_Piece | None]] = []
    units, info = [], []
    for key in kept:
        row, srow, unit = [], [], "?"
        for s in sweeps:
            grp, s0, cnt, st = groups[key][s]
            p, unit, d = _piece(path, grp, notes, s0, cnt)
            row.append(p)
            sp = None
            if st is not None:
                sp = _piece(path, st[0], notes, st[1], st[2])[0]
            srow.append(sp)
        pieces.append(row)
        stims.append(srow)
        units.append(unit)
        grp0 = groups[key][sweeps[0]][0]
        info.append((key, _float(grp0["gain"][()], 0.0) if "gain" in grp0 else None,
                     _float(_attr(grp0["data"], "resolution", -1.0), -1.0)))
    return pieces, stims, units, info, sweeps


# -------------------------------------------------------------------------- extracellular

def _extracellular(path: Path, f: Any, series: list[Any], notes: list[str]):
    h5py = _h5py(path)
    infos = []
    for g in series:
        d = _dataset(path, g, (1, 2))
        rate, t0 = _time(path, g, int(d.shape[0]), notes)
        infos.append((g, d, rate, t0))
    main = max(infos, key=lambda x: (x[1].shape[1] if x[1].ndim == 2 else 1) * x[1].shape[0])
    same = [x for x in infos if abs(x[2] - main[2]) <= _RATE_RTOL * main[2]
            and x[1].shape[0] == main[1].shape[0] and abs(x[3] - main[3]) < 0.5 / main[2]]
    for x in infos:
        if x not in same:
            notes.append(f"{x[0].name} left out: its rate, length or start differs from "
                         f"{main[0].name}")
    pieces, names, resolutions = [], [], []
    for g, d, rate, t0 in same:
        cols = d.shape[1] if d.ndim == 2 else 1
        if len(pieces) + cols > _MAX_CHANNELS:
            raise _err(path, "unsupported", f"more than {_MAX_CHANNELS} channels")
        conv = np.ones(cols)
        if "channel_conversion" in g:
            cc = np.asarray(g["channel_conversion"][:cols], dtype=np.float64)
            if len(cc) == cols and np.all(np.isfinite(cc)):
                conv = cc
        labels = _electrode_labels(g, cols, h5py)
        for c in range(cols):
            p, unit, _ = _piece(path, g, notes, 0, -1, c if d.ndim == 2 else None,
                                float(conv[c]))
            pieces.append([p])
            names.append(labels[c])
            resolutions.append(_float(_attr(d, "resolution", -1.0), -1.0))
    return pieces, names, resolutions, unit


def _electrode_labels(g: Any, cols: int, h5py: Any) -> list[str]:
    """Channel names from the electrodes table rows the series points at (label, else id)."""
    try:
        rows = np.asarray(g["electrodes"][:cols], dtype=np.int64)
        table = g.file[_attr(g["electrodes"], "table")]
        col = "label" if "label" in table else "id"
        values = table[col][()]
        group = table["group_name"][()] if "group_name" in table else None
        out = []
        for r in rows:
            name = _text(values[r]) if col == "label" else f"electrode {int(values[r])}"
            if group is not None:
                name += f" ({_text(group[r])})"
            out.append(name)
        return out if len(out) == cols else [f"electrode {c}" for c in range(cols)]
    except (KeyError, ValueError, TypeError, IndexError, OSError):
        return [f"electrode {c}" for c in range(cols)]


# ------------------------------------------------------------------------------- source

class _Source:
    """Reads pieces (one per channel and sweep) of datasets, opening the file per read."""

    def __init__(self, path: Path, pieces: list[list[_Piece]], lengths: tuple[int, ...],
                 scaled: list[bool], dtype: np.dtype) -> None:
        self._path, self._pieces, self._scaled, self.dtype = path, pieces, scaled, dtype
        self._offsets = np.concatenate(([0], np.cumsum(lengths))).astype(np.int64)

    def _column(self, f: Any, c: int, a: int, b: int) -> np.ndarray:
        out = np.empty(b - a, dtype=np.float64 if self._scaled[c] else self.dtype)
        k = int(np.searchsorted(self._offsets, a, side="right")) - 1
        pos = a
        while pos < b:
            base, end = int(self._offsets[k]), int(self._offsets[k + 1])
            p = self._pieces[c][k]
            lo, hi = pos - base, min(b, end) - base
            d = f[p.data]
            part = d[p.start + lo:p.start + hi] if p.col is None else \
                d[p.start + lo:p.start + hi, p.col]
            if self._scaled[c]:
                part = part.astype(np.float64) * p.gain + p.offset
            out[pos - a:pos - a + hi - lo] = part
            pos, k = base + hi, k + 1
        return out

    def read(self, a: int, b: int, channel: int | None) -> np.ndarray:
        h5py = _h5py(self._path)
        try:
            with h5py.File(self._path, "r", locking=False) as f:
                if channel is not None:
                    return self._column(f, channel, a, b)
                return self._columns(f, a, b)
        except OSError as e:
            raise _err(self._path, "unreadable", f"reading samples failed ({str(e)[:160]}); "
                       f"the file changed or is damaged") from e

    def _columns(self, f: Any, a: int, b: int) -> np.ndarray:
        """Every channel's samples [a, b): channels that are columns of one dataset (an
        ElectricalSeries) come from one hyperslab of all its columns, not one read each."""
        n = len(self._pieces)
        out = np.empty((b - a, n), dtype=np.float64 if any(self._scaled) else self.dtype)
        if not n:
            return out
        k = int(np.searchsorted(self._offsets, a, side="right")) - 1
        pos = a
        while pos < b:
            base, end = int(self._offsets[k]), int(self._offsets[k + 1])
            lo, hi = pos - base, min(b, end) - base
            slabs: dict[tuple[str, int], np.ndarray] = {}
            first = self._pieces[0][k]
            if (pos == a and min(b, end) == b and not any(self._scaled)
                    and all(self._pieces[c][k].data == first.data
                            and self._pieces[c][k].start == first.start
                            and self._pieces[c][k].col == c for c in range(n))):
                # every channel is its own column of one dataset, in order: the hyperslab
                # of all columns is the answer as it is
                slab = f[first.data][first.start + lo:first.start + hi][:, :n]
                if slab.dtype == out.dtype and slab.flags.c_contiguous:
                    return slab
                out[...] = slab
                return out
            for c in range(n):
                p = self._pieces[c][k]
                if p.col is None:
                    part = f[p.data][p.start + lo:p.start + hi]
                else:
                    key = (p.data, p.start)
                    if key not in slabs:
                        slabs[key] = f[p.data][p.start + lo:p.start + hi]
                    part = slabs[key][:, p.col]
                if self._scaled[c]:
                    part = part.astype(np.float64) * p.gain + p.offset
                out[pos - a:pos - a + hi - lo, c] = part
            pos, k = base + hi, k + 1
        return out

    def close(self) -> None:
        pass


# ------------------------------------------------------------------------------- open

def _start_time(path: Path, f: Any, notes: list[str]) -> datetime | None:
    for key in ("timestamps_reference_time", "session_start_time"):
        if key in f:
            text = _text(f[key][()]).strip()
            try:
                return datetime.fromisoformat(text.replace("Z", "+00:00"))
            except ValueError:
                notes.append(f"{key} {text[:40]!r} is not an ISO 8601 time")
    notes.append("no session start time; recorded_at is unknown")
    return None


def open_nwb(path: Path) -> Recording:
    """Open an NWB file as a Recording; RecordingError for any file that cannot be measured."""
    path = Path(path)
    h5py = _h5py(path)
    size = path.stat().st_size
    notes = check_end(path, size)
    try:
        f = h5py.File(path, "r", locking=False)
    except OSError as e:
        raise _err(path, "bad_header", f"the HDF5 library cannot open it ({str(e)[:160]}); "
                   f"the file is damaged") from e
    try:
        with f:
            return _build(path, f, notes)
    except RecordingError:
        raise
    except (KeyError, ValueError, TypeError, IndexError, OSError, RuntimeError) as e:
        raise _err(path, "bad_header", f"the NWB structure is inconsistent "
                   f"({type(e).__name__}: {str(e)[:160]}); the file is damaged") from e


def _build(path: Path, f: Any, notes: list[str]) -> Recording:
    version = _text(_attr(f, "nwb_version", ""))
    if not version and _text(_attr(f, "neurodata_type", "")) != "NWBFile":
        raise _err(path, "unsupported", "an HDF5 file without the NWB version attribute: not "
                   "an NWB file, and no other HDF5 format is read from this name")
    start = _start_time(path, f, notes)
    responses = _series(f, "acquisition", _is_icephys)
    electrical = _series(f, "acquisition", _is_ecephys)
    commands: dict[int, SampledCommand] = {}
    if responses:
        if electrical:
            notes.append(f"{len(electrical)} extracellular series left out: the intracellular "
                         f"series are measured")
        pieces, stims, units, info, _ = _intracellular(path, f, responses, notes)
        names = [f"{k[0].rsplit('/', 1)[-1]} {'current' if u == 'pA' else 'voltage'}"
                 for (k, _, _), u in zip(info, units)]
        amp = [g for _, g, _ in info]
        res = [r for _, _, r in info]
    elif electrical:
        pieces, names, res, unit = _extracellular(path, f, electrical, notes)
        units, amp, stims = [unit] * len(pieces), [None] * len(pieces), [[None]] * len(pieces)
    else:
        raise _err(path, "unsupported", "no electrophysiology series in /acquisition (no "
                   "PatchClampSeries and no ElectricalSeries); nothing to measure")
    rate = pieces[0][0].rate
    if any(abs(p.rate - rate) > _RATE_RTOL * rate for row in pieces for p in row):
        raise _err(path, "unsupported", "the series have different sample rates; qcd measures "
                   "recordings with one rate")
    n_sweeps = len(pieces[0])
    lengths = tuple(min(row[k].n for row in pieces) for k in range(n_sweeps))
    if any(row[k].n != lengths[k] for row in pieces for k in range(n_sweeps)):
        notes.append("the channels of some sweeps differ in length; the shorter is used")
    if sum(lengths) == 0:
        raise _err(path, "unsupported", "the electrophysiology series hold no samples")
    dtypes = [f[row[0].data].dtype for row in pieces]
    scaled = [len({(p.gain, p.offset) for p in row}) > 1 for row in pieces]
    if any(scaled):
        notes.append("the scale (conversion, offset) changes between sweeps; those channels are "
                     "scaled while read")
    dtype = np.result_type(*dtypes)
    channels = []
    for c, row in enumerate(pieces):
        gain, off = (1.0, 0.0) if scaled[c] else (row[0].gain, row[0].offset)
        if gain == 0.0 or not np.isfinite(gain):
            raise _err(path, "bad_header", f"channel {c}: conversion {gain!r} (expected a "
                       f"finite number other than 0)")
        rails = None
        if not scaled[c] and dtypes[c].kind in "iu":
            info_ = np.iinfo(dtypes[c])
            lo, hi = info_.min * gain + off, info_.max * gain + off
            rails = (min(lo, hi), max(lo, hi))
        # resolution is stated in the NWB unit (amperes, volts)
        r = res[c] * _UNIT_FACTOR.get(units[c], 1.0) if res[c] > 0 else None
        channels.append(Channel(c, names[c], units[c], rails, None, gain, off, None, r,
                                amp[c]))
    if any(ch.rails is not None for ch in channels):
        notes.append("converter rails taken as the limits of the stored integer type")
    for c, srow in enumerate(stims):
        if any(s is not None for s in srow):
            cunit = "mV" if units[c] == "pA" else "pA"
            commands[c] = _command(path, c, srow, cunit, lengths)
    t0 = pieces[0][0].t0
    starts = tuple(row.t0 - t0 for row in pieces[0])
    if any(b <= a for a, b in zip(starts, starts[1:])):
        notes.append("sweep start times are not increasing; sweeps are taken back to back")
        starts = tuple(float(x) / rate for x in np.concatenate(([0], np.cumsum(lengths)[:-1])))
    when = None
    if start is not None:
        from datetime import timedelta
        when = start + timedelta(seconds=t0)
    header = Header(path, "NWB", version, rate, n_sweeps == 1 and not commands,
                    tuple(channels), lengths, starts, when, (), tuple(notes))
    return Recording(header, _Source(path, pieces, lengths, scaled, dtype), commands)


def _command(path: Path, channel: int, srow: list[_Piece | None], unit: str,
             lengths: tuple[int, ...]) -> SampledCommand:
    def read(sweep: int) -> np.ndarray | None:
        p = srow[sweep]
        if p is None:
            return None
        h5py = _h5py(path)
        n = min(p.n, lengths[sweep])
        try:
            with h5py.File(path, "r", locking=False) as f:
                raw = f[p.data][p.start:p.start + n]
        except OSError as e:
            raise _err(path, "unreadable", f"reading the stimulus failed ({str(e)[:160]})") \
                from e
        return raw.astype(np.float64) * p.gain + p.offset

    first = next(k for k, p in enumerate(srow) if p is not None)
    head = read(first)
    holding = float(head[0]) if head is not None and len(head) else 0.0
    return SampledCommand(channel, unit, holding, True, f"stimulus {channel}", read, lengths)
