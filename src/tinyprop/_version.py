"""The version of tinyprop, in one place: the package, model files, generated code and reports read it here."""

__version__ = "0.1.0"
