"""planrunner: pre-specified resampling analyses from a YAML plan, with an audit-ready record."""

__version__ = "0.1.0"
