"""The packaged rule files (``default.toml`` and per-mode examples), installed as ``qcd.rules``."""
