"""The exceptions of shortcut_audit.

Every error the tool raises on purpose is an :class:`AuditError`. Each subclass also
inherits the builtin that matches it, so callers may catch either::

    AuditError
    ├── UsageError(ValueError)     an option or argument value is wrong
    ├── ModelError(ValueError)     the ONNX model cannot be used as an image classifier
    ├── DataError(ValueError)      the image set as a whole cannot be read (manifest, root)
    ├── ImageSkip(ValueError)      one image cannot be used; the audit lists it and goes on
    ├── OutputError(OSError)       results cannot be written (read-only folder, full disk)
    └── ClusterError(RuntimeError) the Dask cluster cannot run the audit

Messages are one line: what is wrong, the value received, and what to do.
"""

from __future__ import annotations

__all__ = [
    "AuditError",
    "UsageError",
    "ModelError",
    "DataError",
    "ImageSkip",
    "OutputError",
    "ClusterError",
]


class AuditError(Exception):
    """Base of every error shortcut_audit raises on purpose."""


class UsageError(AuditError, ValueError):
    """An option or argument has a value the tool cannot use."""


class ModelError(AuditError, ValueError):
    """The model file cannot be used as a single-image classifier."""


class DataError(AuditError, ValueError):
    """The image set as a whole cannot be read (bad manifest, missing root, no images)."""


class ImageSkip(AuditError, ValueError):
    """One image cannot be used; the audit records ``reason`` and goes on."""

    def __init__(self, reason: str, path: str | None = None):
        super().__init__(reason)
        self.reason = reason
        self.path = path


class OutputError(AuditError, OSError):
    """Results cannot be written where asked."""


class ClusterError(AuditError, RuntimeError):
    """The cluster cannot run the audit (no workers, lost scheduler, different files)."""
