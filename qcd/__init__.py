"""qcd: background quality control for electrophysiology rigs.

Public API: open_recording, analyze_path, FileMeasures and the errors.
"""
__version__ = "0.1.0"

from qcd.errors import ConfigError, DeliveryError, QcdError, RecordingError, StoreError

__all__ = ["__version__", "QcdError", "ConfigError", "RecordingError", "DeliveryError",
           "StoreError", "open_recording", "analyze_path", "FileMeasures"]


def __getattr__(name: str):  # lazy, so `import qcd` stays cheap for the CLI and workers
    if name == "open_recording":
        from qcd.recording import open_recording
        return open_recording
    if name == "analyze_path":
        from qcd.analyze import analyze_path
        return analyze_path
    if name == "FileMeasures":
        from qcd.results import FileMeasures
        return FileMeasures
    raise AttributeError(name)
