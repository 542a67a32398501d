"""Corrupt-file table built from real recordings: each case makes one bad file in a folder.

``build(folder, abf2_source, abf1_source)`` returns ``[(name, path, expected_kind, what)]``.
Header offsets follow the ABF2 section table (16-byte entries from byte 76: block, entry size,
entry count) and the fixed ABF1 header layout (offsets as read by pyabf's header modules).
Run as a script (``python badfiles.py FOLDER ABF2 ABF1 LIMIT_MB``) it opens every case, then
300 seeded random corruptions, under an address-space limit and prints JSON lines;
test_recording.py does that in a subprocess (``--hdf5 FOLDER N LIMIT_MB``: the same for
corruptions of a small NWB file, for test_formats.py).
"""
from __future__ import annotations

import json
import os
import random
import resource
import struct
import sys
import time
import tracemalloc
from pathlib import Path

# ABF2 section-table entries (byte offset of each 16-byte entry in the header)
_ADC, _DATA, _STRINGS, _SYNCH, _TAG = 92, 236, 220, 316, 252


def _patch(src: bytes, *edits: tuple[int, str, object]) -> bytes:
    buf = bytearray(src)
    for off, fmt, value in edits:
        struct.pack_into(fmt, buf, off, value)
    return bytes(buf)


def _section(src: bytes, off: int) -> tuple[int, int, int]:
    return struct.unpack_from("<IIq", src, off)


def build(folder: Path, abf2_source: Path, abf1_source: Path) -> list[tuple[str, Path, str, str]]:
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    v2 = Path(abf2_source).read_bytes()
    v1 = Path(abf1_source).read_bytes()
    cases: list[tuple[str, Path, str, str]] = []

    def put(name: str, data: bytes, kind: str, what: str, suffix: str = ".abf") -> None:
        p = folder / f"{name}{suffix}"
        p.write_bytes(data)
        cases.append((name, p, kind, what))

    d_block, d_entry, d_count = _section(v2, _DATA)
    data_end = d_block * 512 + d_entry * d_count
    proto_block = _section(v2, 76)[0]
    adc_block = _section(v2, _ADC)[0]

    put("zero_length", b"", "empty", "0 bytes, as when a copy has just been created")
    put("signature_only", v2[:4], "truncated", "just the 4-byte ABF2 signature")
    put("cut_in_header", v2[:300], "truncated", "cut inside the 512-byte ABF2 header")
    put("cut_after_header", v2[:600], "truncated", "cut before the protocol section ends")
    put("cut_in_data", v2[:d_block * 512 + (data_end - d_block * 512) // 2], "truncated",
        "cut half-way through the samples")
    put("cut_one_sample_short", v2[:data_end - 2], "truncated", "one sample missing")
    put("wrong_signature", b"XBF2" + v2[4:], "bad_signature", "first byte changed")
    put("text_renamed", b"time,value\n0.0,1.5\n0.1,1.6\n" * 100, "bad_signature",
        "a CSV text file renamed to .abf")
    put("image_renamed", b"\x89PNG\r\n\x1a\n" + bytes(range(256)) * 8, "bad_signature",
        "an image file renamed to .abf")
    rng = random.Random(20240601)
    put("garbage_after_abf2_signature", b"ABF2" + rng.randbytes(65536), "bad_header",
        "ABF2 signature followed by random bytes")
    put("garbage_after_abf1_signature", b"ABF " + rng.randbytes(65536), "bad_header",
        "ABF1 signature followed by random bytes")
    put("absurd_channel_count", _patch(v2, (_ADC + 8, "<q", 1_000_000)), "bad_header",
        "the input-channel count patched to a million")
    put("zero_channels", _patch(v2, (_ADC + 8, "<q", 0)), "bad_header",
        "the input-channel count patched to 0")
    put("absurd_sweep_count", _patch(v2, (12, "<I", 0xFFFFFFF0)), "bad_header",
        "the sweep count patched to about 4 billion")
    put("absurd_sweep_table", _patch(v2, (_SYNCH + 8, "<q", 2 ** 40)), "bad_header",
        "the sweep table's entry count patched to 2**40")
    put("zero_size_entries", _patch(v2, (_TAG, "<I", 1), (_TAG + 4, "<I", 0),
                                    (_TAG + 8, "<q", 50_000)), "bad_header",
        "50,000 tags of 0 bytes each (the header library would loop on one spot)")
    put("huge_text_section", _patch(v2, (_STRINGS + 4, "<I", 60_000),
                                    (_STRINGS + 8, "<q", 4000)), "bad_header",
        "a 240 MB text section (read byte by byte by the header library)")
    put("claims_double_data", _patch(v2, (_DATA + 8, "<q", d_count * 2)), "truncated",
        "the data section's sample count doubled")
    put("data_inside_header", _patch(v2, (_DATA, "<I", 0)), "bad_header",
        "the data section pointed at byte 0")
    put("bad_sample_format", _patch(v2, (30, "<H", 7)), "bad_header",
        "sample format code 7")
    put("zero_sample_interval", _patch(v2, (proto_block * 512 + 2, "<f", 0.0)), "bad_header",
        "sample interval 0 (the header library divides by it)")
    put("nan_sample_interval", _patch(v2, (proto_block * 512 + 2, "<f", float("nan"))),
        "bad_header", "sample interval NaN")
    put("zero_instrument_scale", _patch(v2, (adc_block * 512 + 40, "<f", 0.0)), "bad_header",
        "channel 0's instrument scale factor 0 (the header library divides by it)")

    # ABF1: fixed header offsets
    put("abf1_cut_in_header", v1[:3000], "truncated", "ABF1 cut inside its 6 KB header")
    a1_ptr = struct.unpack_from("<i", v1, 40)[0]
    a1_len = struct.unpack_from("<i", v1, 10)[0]
    put("abf1_cut_in_data", v1[:a1_ptr * 512 + a1_len], "truncated",
        "ABF1 cut half-way through the samples")
    put("abf1_absurd_channels", _patch(v1, (120, "<h", 99)), "bad_header",
        "ABF1 channel count 99")
    put("abf1_bad_sampling_sequence", _patch(v1, (410, "<h", -3)), "bad_header",
        "ABF1 sampling sequence naming channel -3")
    put("abf1_absurd_tags", _patch(v1, (48, "<i", 2 ** 31 - 1)), "bad_header",
        "ABF1 tag count 2**31-1 (the header library preallocates a list that long)")
    put("abf1_absurd_sweeps", _patch(v1, (16, "<i", -5)), "bad_header",
        "ABF1 sweep count -5")
    put("abf1_claims_more_data", _patch(v1, (10, "<i", a1_len * 4)), "truncated",
        "ABF1 sample count four times too large")
    put("abf1_float_samples", _patch(v1, (100, "<h", 1)), "unsupported",
        "ABF1 with 32-bit float samples, which the header library cannot read")
    put("abf1_bad_version", _patch(v1, (4, "<f", float("inf"))), "bad_header",
        "ABF1 format version infinity")

    # NWB (HDF5) and the formats read through python-neo; the NWB files follow pynwb's layout
    ok = folder / "mini.h5"
    mini_nwb(ok)
    good = ok.read_bytes()
    ok.unlink()
    put("nwb_cut_in_half", good[:len(good) // 2], "truncated",
        "an NWB file cut half-way (the superblock's end-of-file address is past the end)",
        ".nwb")
    put("nwb_superblock_only", good[:40], "truncated", "only the first 40 bytes of an NWB file",
        ".nwb")
    put("hdf5_garbage_after_signature", good[:8] + b"\x07" + rng.randbytes(4096), "bad_header",
        "the HDF5 signature followed by random bytes (superblock version 7)", ".nwb")
    mini_nwb(folder / "nwb_no_ephys_series.nwb", series=False)
    cases.append(("nwb_no_ephys_series", folder / "nwb_no_ephys_series.nwb", "unsupported",
                  "an NWB file whose /acquisition holds no electrophysiology series"))
    mini_nwb(folder / "hdf5_not_nwb.nwb", nwb=False)
    cases.append(("hdf5_not_nwb", folder / "hdf5_not_nwb.nwb", "unsupported",
                  "a plain HDF5 file named .nwb"))
    mini_nwb(folder / "nwb_huge_chunks.nwb", chunk=20_000_000)
    cases.append(("nwb_huge_chunks", folder / "nwb_huge_chunks.nwb", "unsupported",
                  "an NWB series stored in 80 MB chunks (each read would inflate one whole)"))
    nix = folder / "nix_cut.nix"
    nix.write_bytes(good[:len(good) // 3])
    cases.append(("nix_cut_short", nix, "truncated", "an HDF5 file named .nix cut short"))
    put("neo_cannot_parse_wcp", rng.randbytes(20_000), "bad_header",
        "random bytes named .wcp: python-neo's reader fails on them", ".wcp")
    put("neo_cannot_parse_edr", rng.randbytes(20_000), "bad_header",
        "random bytes named .edr: python-neo's reader fails on them", ".edr")
    put("neo_cannot_parse_rhd", rng.randbytes(20_000), "bad_header",
        "random bytes named .rhd: python-neo's reader fails on them", ".rhd")
    put("neo_needs_companion", rng.randbytes(4096), "unsupported",
        "a .ns5 file: python-neo reads that format only with its companion files", ".ns5")

    # not regular files / not readable
    d = folder / "folder.abf"
    d.mkdir()
    cases.append(("folder_named_abf", d, "not_a_file", "a folder named x.abf"))
    fifo = folder / "pipe.abf"
    os.mkfifo(fifo)
    cases.append(("fifo_named_abf", fifo, "not_a_file",
                  "a named pipe (opening it would block forever)"))
    dangling = folder / "dangling.abf"
    dangling.symlink_to(folder / "gone" / "missing.abf")
    cases.append(("dangling_link", dangling, "unreadable", "a link to a file that is gone"))
    loop = folder / "loop.abf"
    loop.symlink_to(loop)
    cases.append(("link_loop", loop, "unreadable", "a link that points at itself"))
    cases.append(("missing", folder / "never_written.abf", "unreadable",
                  "a path that does not exist"))
    if os.geteuid() != 0:  # root reads any file whatever its mode: the links above stand in
        locked = folder / "locked.abf"
        locked.write_bytes(v2)
        locked.chmod(0)
        cases.append(("no_read_permission", locked, "unreadable", "mode 000"))
    unknown = folder / "recording.dat"
    unknown.write_bytes(b"sample,value\n" + v2[4:])
    cases.append(("unknown_suffix", unknown, "unsupported",
                  "an unknown signature named .dat (a valid ABF2 named so is read as ABF)"))
    return cases


def mini_nwb(path: Path, *, series: bool = True, nwb: bool = True, chunk: int = 0) -> None:
    """A small NWB file written with h5py in pynwb's layout: one voltage-clamp sweep."""
    import h5py
    import numpy as np
    with h5py.File(path, "w") as f:
        if nwb:
            f.attrs["nwb_version"] = "2.7.0"
            f.attrs["neurodata_type"] = "NWBFile"
            f["session_start_time"] = "2024-05-01T09:30:00+02:00"
        f.create_group("acquisition")
        f.create_group("general/intracellular_ephys/electrode0")
        if not series:
            g = f["acquisition"].create_group("temperature")
            g.attrs["neurodata_type"] = "TimeSeries"
            g["data"] = np.zeros(100)
            return
        g = f["acquisition"].create_group("sweep0")
        g.attrs.update(neurodata_type="VoltageClampSeries", sweep_number=0)
        if chunk:
            d = g.create_dataset("data", shape=(100,), maxshape=(None,), dtype="<i4",
                                 chunks=(chunk,))
        else:
            d = g.create_dataset("data", data=np.random.default_rng(1).integers(
                -300, 300, 20_000).astype("<i2"))
        d.attrs.update(unit="amperes", conversion=1e-12, offset=0.0, resolution=-1.0)
        st = g.create_dataset("starting_time", data=0.0)
        st.attrs.update(rate=20_000.0, unit="seconds")
        g["electrode"] = h5py.SoftLink("/general/intracellular_ephys/electrode0")


def mutations(sources: list[Path], n: int, seed: int):
    """``n`` seeded corruptions of real files: random bytes, extreme integers and floats
    written mostly into the header, sometimes a cut. Yields (label, bytes)."""
    rng = random.Random(seed)
    blobs = [Path(p).read_bytes() for p in sources]
    extremes = [0, 1, 2, 63, 64, 65, 0x7FFF, 0xFFFF, 2 ** 31 - 1, 2 ** 32 - 1]
    for i in range(n):
        buf = bytearray(rng.choice(blobs))
        for _ in range(rng.choice([1, 2, 4, 16])):
            r = rng.random()
            off = rng.randrange(4, 512) if r < 0.6 else rng.randrange(4, min(8192, len(buf)))
            pick = rng.random()
            if pick < 0.4:
                buf[off] = rng.randrange(256)
            elif pick < 0.8:
                struct.pack_into("<I", buf, off & ~1, rng.choice(extremes))
            else:
                struct.pack_into("<f", buf, off & ~3,
                                 rng.choice([0.0, -1.0, 1e30, float("inf"), float("nan")]))
        if rng.random() < 0.2:
            buf = buf[:rng.randrange(4, len(buf))]
        yield f"mutation_{i}", bytes(buf)


def _fuzz(folder: Path, sources: list[Path], n: int) -> dict:
    """Open every mutation and read all it offers; collect anything but RecordingError."""
    from qcd.errors import RecordingError
    from qcd.recording import open_recording

    other, slowest, outcomes = [], 0.0, {}
    path = folder / "mutation.abf"
    for label, data in mutations(sources, n, seed=7):
        path.write_bytes(data)
        t0 = time.perf_counter()
        try:
            with open_recording(path) as rec:
                for ch in range(len(rec.channels)):
                    for _ in rec.chunks(ch, size=1 << 16):
                        pass
                    rec.sweep(ch, rec.n_sweeps - 1)
                for cmd in rec.commands.values():
                    cmd.waveform(0)
            outcomes["ok"] = outcomes.get("ok", 0) + 1
        except RecordingError as e:
            outcomes[e.kind] = outcomes.get(e.kind, 0) + 1
        except BaseException as e:  # noqa: BLE001 - exactly what the test forbids
            other.append(f"{label}: {type(e).__name__}: {str(e)[:200]}")
        slowest = max(slowest, time.perf_counter() - t0)
    return {"fuzz": n, "other": other, "slowest": slowest, "outcomes": outcomes}


def hdf5_mutations(source: bytes, n: int, seed: int):
    """``n`` seeded corruptions of an HDF5 file: bytes changed in its first 16 KB (superblock,
    object headers, B-trees, heaps). Yields (label, bytes)."""
    rng = random.Random(seed)
    for i in range(n):
        buf = bytearray(source)
        for _ in range(rng.choice([1, 2, 4, 8])):
            buf[rng.randrange(8, min(len(buf), 16384))] = rng.randrange(256)
        if rng.random() < 0.1:
            buf = buf[:rng.randrange(8, len(buf))]
        yield f"hdf5_mutation_{i}", bytes(buf)


def _hdf5_fuzz(folder: Path, n: int) -> dict:
    """Open and read every HDF5 mutation; collect anything but RecordingError."""
    from qcd.errors import RecordingError
    from qcd.recording import open_recording

    src = folder / "source.nwb"
    mini_nwb(src)
    path = folder / "mutation.nwb"
    other, slowest, outcomes = [], 0.0, {}
    for label, data in hdf5_mutations(src.read_bytes(), n, seed=11):
        path.write_bytes(data)
        t0 = time.perf_counter()
        try:
            with open_recording(path) as rec:
                for _ in rec.raw_chunks_all(size=1 << 14):
                    pass
                for cmd in rec.commands.values():
                    cmd.waveform(0)
            outcomes["ok"] = outcomes.get("ok", 0) + 1
        except RecordingError as e:
            outcomes[e.kind] = outcomes.get(e.kind, 0) + 1
        except BaseException as e:  # noqa: BLE001 - exactly what the test forbids
            other.append(f"{label}: {type(e).__name__}: {str(e)[:200]}")
        slowest = max(slowest, time.perf_counter() - t0)
    return {"fuzz": n, "other": other, "slowest": slowest, "outcomes": outcomes}


def _run(folder: Path, abf2: Path, abf1: Path, limit_mb: int) -> None:
    """Open every case under an address-space limit; one JSON line per case."""
    from qcd.recording import open_recording  # after the limit is set below

    cases = build(folder, abf2, abf1)
    for name, path, kind, _what in cases:
        tracemalloc.start()
        t0 = time.perf_counter()
        res = {"name": name, "expected": kind}
        try:
            with open_recording(path) as rec:
                for ch in range(len(rec.channels)):
                    for _ in rec.chunks(ch):
                        pass
            res.update(type="none", kind=None, message="")
        except BaseException as e:  # noqa: BLE001 - report every type, the test judges
            res.update(type=type(e).__name__, kind=getattr(e, "kind", None), message=str(e))
        res["seconds"] = time.perf_counter() - t0
        res["peak_bytes"] = tracemalloc.get_traced_memory()[1]
        tracemalloc.stop()
        res["path"] = str(path)
        print(json.dumps(res), flush=True)
    print(json.dumps(_fuzz(folder, [abf2, abf1], 300)), flush=True)
    print(json.dumps({"done": True, "limit_mb": limit_mb}), flush=True)


def _limit_memory(limit_mb: int) -> None:
    import numpy  # noqa: F401 - imported before the limit so its arenas are counted in the base
    import pyabf  # noqa: F401
    import h5py  # noqa: F401
    import neo.rawio  # noqa: F401

    with open("/proc/self/statm") as fh:
        base = int(fh.read().split()[0]) * os.sysconf("SC_PAGE_SIZE")
    cap = base + int(limit_mb) * (1 << 20)
    resource.setrlimit(resource.RLIMIT_AS, (cap, cap))


if __name__ == "__main__":
    if sys.argv[1] == "--hdf5":          # badfiles.py --hdf5 FOLDER N LIMIT_MB
        _limit_memory(int(sys.argv[4]))
        print(json.dumps(_hdf5_fuzz(Path(sys.argv[2]), int(sys.argv[3]))), flush=True)
    else:
        _folder, _abf2, _abf1, _limit = sys.argv[1:5]
        _limit_memory(int(_limit))
        _run(Path(_folder), Path(_abf2), Path(_abf1), int(_limit))
