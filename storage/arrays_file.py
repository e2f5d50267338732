"""Small named-array files (``.npz``): synthetic truth, station filters.

Written atomically (temporary file, then rename); read back with every
array loaded, never with pickled objects.
"""

from __future__ import annotations

import io
from pathlib import Path

import numpy as np

from descatter.storage.atomic import write_bytes_atomic
from descatter.tasks.errors import InputNotFoundError, StoreFormatError


def write_arrays(path: str | Path, arrays: dict[str, np.ndarray]) -> Path:
    """Write ``arrays`` to ``path`` as an uncompressed .npz; the round trip
    through :func:`read_arrays` gives equal arrays with equal dtypes."""
    buf = io.BytesIO()
    np.savez(buf, **{k: np.asarray(v) for k, v in arrays.items()})
    write_bytes_atomic(Path(path), buf.getvalue())
    return Path(path)


def read_arrays(path: str | Path) -> dict[str, np.ndarray]:
    path = Path(path)
    if not path.is_file():
        raise InputNotFoundError(f"{path}: no such file")
    try:
        with np.load(path, allow_pickle=False) as z:
            return {k: z[k] for k in z.files}
    except (ValueError, OSError) as exc:
        raise StoreFormatError(f"{path}: not a readable .npz array file ({exc})") from None


TRUTH_FILE = "truth.npz"  # a synthetic survey's truth, beside its SEG-Y files


def truth_path(survey_dir: str | Path) -> Path:
    """Where a synthetic survey written to ``survey_dir`` keeps its truth."""
    return Path(survey_dir) / TRUTH_FILE


def truth_beside(segy_files: list[str | Path]) -> tuple[list[Path], list[Path]]:
    """The truth file each folder of ``segy_files`` would hold (distinct,
    sorted), and those of them that exist."""
    candidates = sorted({truth_path(Path(f).parent) for f in segy_files})
    return candidates, [p for p in candidates if p.is_file()]
