"""The one error root of descatter and its families.

Every error the program raises on purpose is a :class:`DescatterError`. Each
family also inherits the built-in exception a Python caller would expect
(``ValueError`` for bad input, ``FileNotFoundError`` for a missing file), so
``except ValueError`` keeps working. A message says what was got, what was
expected and how to fix it.

This module lives in ``tasks`` (the bottom room) so that ``storage`` and
``flows`` can both raise and catch these without importing each other.
"""

from __future__ import annotations


class DescatterError(Exception):
    """Root of every error descatter raises on purpose."""


class ConfigError(DescatterError, ValueError):
    """A survey config file or option is missing, mistyped or out of range."""


class InputNotFoundError(DescatterError, FileNotFoundError):
    """An input file or store does not exist."""


class SegyFormatError(DescatterError, ValueError):
    """A file is not SEG-Y, is truncated, or uses a layout we do not read."""


class SampleRangeError(DescatterError, ValueError):
    """A sample value cannot be represented in the target format."""


class StoreFormatError(DescatterError, ValueError):
    """A path is not a descatter survey store, or its layout is too new."""


class SwathConflictError(DescatterError, ValueError):
    """A swath is incompatible with the store (different file, sampling...)."""


class GeometryError(DescatterError, ValueError):
    """Source or receiver geometry is missing, inconsistent or unusable."""


class LockHeldError(DescatterError, RuntimeError):
    """Another process holds the store's writer lock."""


class TraceQcError(DescatterError, ValueError):
    """Traces carry a QC flag whose policy is ``error``."""


class ClusterStartError(DescatterError, RuntimeError):
    """A cluster profile's workers cannot be started here, or did not join in time."""
