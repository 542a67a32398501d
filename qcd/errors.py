"""Errors qcd raises on purpose, and the exit codes the command line gives them. Imports
nothing from qcd, so every layer can use it."""
from __future__ import annotations

import os

__all__ = ["QcdError", "ConfigError", "RecordingError", "DeliveryError", "StoreError",
           "RECORDING_ERROR_KINDS", "printable", "path_bytes", "EXIT_OK", "EXIT_FAILED",
           "EXIT_USAGE"]

# Stable codes stored with every failed file (files.error_kind). Never rename one.
RECORDING_ERROR_KINDS = (
    "empty",          # zero bytes
    "not_a_file",     # a folder or a special file where a recording was expected
    "unreadable",     # the OS refused to open or read it (permissions, vanished)
    "bad_signature",  # the first bytes are not a known format's signature
    "bad_header",     # the signature is right but the header is inconsistent or absurd
    "truncated",      # the header promises more data than the file holds
    "unsupported",    # a valid file qcd cannot measure (format variant, no usable channel)
    "never_settled",  # kept changing for longer than give_up_hours
    "internal",       # a bug in qcd: logged with its traceback, counted as a failure in tests
)


def printable(text: object) -> str:
    """``text`` (a str or path) as valid Unicode: the bytes of a name that is not UTF-8 (which
    Python keeps as lone surrogates) shown escaped, ``caf\\xe9.abf``; valid text unchanged."""
    s = os.fspath(text) if isinstance(text, os.PathLike) else str(text)
    try:
        s.encode("utf-8")
        return s
    except UnicodeEncodeError:
        pass
    try:
        return s.encode("utf-8", "surrogateescape").decode("utf-8", "backslashreplace")
    except UnicodeEncodeError:
        return s.encode("utf-8", "backslashreplace").decode("utf-8")


def path_bytes(path: object) -> bytes | None:
    """The file-system bytes of a path whose name is not valid UTF-8, else None (its text
    is exact then)."""
    s = os.fspath(path)  # type: ignore[arg-type]
    if isinstance(s, bytes):
        return s
    try:
        s.encode("utf-8")
        return None
    except UnicodeEncodeError:
        return os.fsencode(s)


class QcdError(Exception):
    """Every error qcd raises on purpose."""


class ConfigError(QcdError):
    """A config or rule file is wrong: names the file, the key and what was expected."""

    def __init__(self, path: object, key: str, detail: str) -> None:
        self.path, self.key, self.detail = path, key, detail
        where = f"{os.fspath(path)}: " if path else ""
        super().__init__(f"{where}{key}: {detail}" if key else f"{where}{detail}")


class RecordingError(QcdError):
    """A recording cannot be read or measured; ``kind`` is one of RECORDING_ERROR_KINDS."""

    def __init__(self, path: object, kind: str, detail: str) -> None:
        if kind not in RECORDING_ERROR_KINDS:
            raise ValueError(f"unknown recording error kind {kind!r}")
        self.path, self.kind, self.detail = path, kind, detail
        super().__init__(f"{os.fspath(path)}: {detail}")


class DeliveryError(QcdError):
    """A notification target is misconfigured (a bad URL, no target matched)."""


class StoreError(QcdError):
    """The database cannot be opened, migrated or written."""


# Exit codes of the qcd command (qcd.cli maps errors to them; the command bodies return them):
# all good; some file failed (or an alert or delivery problem was found); usage or config error.
EXIT_OK, EXIT_FAILED, EXIT_USAGE = 0, 1, 2
