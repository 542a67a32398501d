"""qcd: background quality control for electrophysiology rigs.

Public API: open_recording, analyze_path, FileMeasures and the errors.
"""
__version__ = "0.1.0"

import os as _os

# One thread of linear algebra per process, unless the user chose otherwise: qcd measures a
# file in one thread and runs files in parallel in worker processes (qcd.workers). A threaded
# BLAS gains nothing on its small products, and its helper thread keeps spinning after each
# call (measured: 40 % more CPU time for scanning a gap-free file). Set here, before anything
# of qcd imports numpy; a program that loaded numpy before qcd keeps its own setting.
for _var in ("OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    _os.environ.setdefault(_var, "1")
del _var

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
