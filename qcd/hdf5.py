"""HDF5 container checks shared by the HDF5-based readers: the superblock's end-of-file address
against the file size (cut short, still being written) and h5py, the optional extra.

Imports qcd.errors only (h5py when a file is opened).
"""
from __future__ import annotations

import struct
from pathlib import Path

from qcd.errors import RecordingError

__all__ = ["HDF5_SIGNATURE", "EXTRA_HINT", "superblock_end", "check_end", "hdf5_unfinished",
           "h5py_module"]

HDF5_SIGNATURE = b"\x89HDF\r\n\x1a\n"
EXTRA_HINT = "pip install 'qcd-ephys[formats]'"


def _err(path: Path, kind: str, detail: str) -> RecordingError:
    return RecordingError(path, kind, detail)


def h5py_module(path: Path):
    """h5py, or RecordingError naming the optional extra that installs it."""
    try:
        import h5py
    except ImportError as e:
        raise _err(path, "unsupported", f"reading HDF5-based files (NWB) needs h5py, from "
                   f"the optional formats extra: {EXTRA_HINT}") from e
    return h5py


def superblock_end(path: Path, size: int) -> tuple[int, int]:
    """(where the HDF5 signature is, the superblock's end-of-file address); RecordingError if none.

    The signature sits at byte 0 or after a user block of 512 * 2**k bytes; the end-of-file
    address follows the base address (HDF5 file format specification, superblock v0-v3).
    """
    try:
        with open(path, "rb") as fh:
            pos = 0
            while pos == 0 or pos < min(size, 1 << 24):
                fh.seek(pos)
                head = fh.read(96)
                if head[:8] == HDF5_SIGNATURE:
                    break
                pos = 512 if pos == 0 else pos * 2
            else:
                raise _err(path, "bad_signature", "no HDF5 signature at byte 0 or after a user "
                           "block; it is not an NWB (HDF5) file (renamed, or another format)")
    except OSError as e:
        raise _err(path, "unreadable", f"reading the HDF5 superblock failed "
                   f"({e.strerror or e})") from e
    if len(head) < 24:
        raise _err(path, "truncated", f"the file has {size} bytes and ends inside the HDF5 "
                   f"superblock; it was cut short or is still being written")
    version = head[8]
    if version in (0, 1):
        width, at = head[13], (24 if version == 0 else 28)
    elif version in (2, 3):
        width, at = head[9], 12
    else:
        raise _err(path, "bad_header", f"the HDF5 superblock version is {version} (expected "
                   f"0..3); the file is corrupt")
    if width not in (2, 4, 8):
        raise _err(path, "bad_header", f"the HDF5 superblock gives {width}-byte addresses "
                   f"(expected 2, 4 or 8); the file is corrupt")
    if len(head) < at + 3 * width:
        raise _err(path, "truncated", "the file ends inside the HDF5 superblock; it was cut "
                   "short or is still being written")
    fmt = {2: "<H", 4: "<I", 8: "<Q"}[width]
    base = struct.unpack_from(fmt, head, at)[0]
    end = struct.unpack_from(fmt, head, at + 2 * width)[0]
    if base and base + end == size:      # an address relative to a user block's end
        end = size
    return pos, end


def check_end(path: Path, size: int) -> list[str]:
    _, end = superblock_end(path, size)
    if end > size:
        raise _err(path, "truncated", f"the HDF5 superblock says the file ends at byte {end}, "
                   f"the file has {size}; it is still being written or was cut short")
    if end < size:
        return [f"the file has {size - end} bytes after the HDF5 end-of-file address {end}"]
    return []


def hdf5_unfinished(path: Path, size: int) -> str | None:
    """Why an HDF5 file of ``size`` bytes is not finished yet, else None.

    Finished: the superblock's end-of-file address equals the size and the HDF5 library opens
    the file. A file that is plainly corrupt counts as finished (its error is stored).
    """
    try:
        _, end = superblock_end(path, size)
    except RecordingError as e:
        return e.detail if e.kind == "truncated" else None
    if end != size:
        return f"the HDF5 superblock says {end} bytes, the file has {size}; still being written"
    try:
        h5py = h5py_module(path)
        with h5py.File(path, "r", locking=False):
            return None
    except RecordingError:
        return None
    except OSError as e:
        return f"the HDF5 library cannot open it yet ({str(e)[:120]})"


