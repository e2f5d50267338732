"""Cluster profile files: ``deploy/clusters/<name>.toml`` on disk <-> the typed
profile of :mod:`descatter.tasks.cluster_profile`.

A profile is named on the command line (``--cluster slurm``) or given as a
path (``--cluster site/bigmem.toml``). A name is looked up, first match wins,
in:

1. the directory named by the environment variable ``DESCATTER_CLUSTERS``
   (unset or empty: skipped);
2. ``deploy/clusters`` under the current directory;
3. ``deploy/clusters`` of the source tree this package was installed from.

A name found nowhere gives a :class:`ConfigError` that lists the names
available.
"""

from __future__ import annotations

import os
import re
from pathlib import Path

from descatter.storage.config_file import read_toml
from descatter.tasks.cluster_profile import ClusterProfile, parse_profile
from descatter.tasks.errors import ConfigError, InputNotFoundError

PROFILE_DIR_ENV = "DESCATTER_CLUSTERS"
PROFILE_SUFFIX = ".toml"
_NAME_RE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]*$")


def source_tree_profiles() -> Path:
    """``deploy/clusters`` beside the package folders (flows/, tasks/, storage/)."""
    return Path(__file__).resolve().parent.parent / "deploy" / "clusters"


def profile_dirs(*, cwd: Path | None = None, environ: dict[str, str] | None = None) -> list[Path]:
    """The directories searched for a profile name, in order (duplicates removed)."""
    environ = os.environ if environ is None else environ
    cwd = Path.cwd() if cwd is None else cwd
    candidates = []
    if environ.get(PROFILE_DIR_ENV):
        candidates.append(Path(environ[PROFILE_DIR_ENV]).expanduser())
    candidates += [cwd / "deploy" / "clusters", source_tree_profiles()]
    seen, out = set(), []
    for d in candidates:
        key = d.resolve() if d.exists() else d
        if key not in seen:
            seen.add(key)
            out.append(d)
    return out


def available_profiles(*, cwd: Path | None = None, environ: dict[str, str] | None = None) -> dict[str, Path]:
    """Every profile name that resolves, with the file it resolves to."""
    found: dict[str, Path] = {}
    for d in profile_dirs(cwd=cwd, environ=environ):
        if d.is_dir():
            for path in sorted(d.glob(f"*{PROFILE_SUFFIX}")):
                found.setdefault(path.stem, path)
    return found


def is_profile_path(text: str) -> bool:
    """A ``--cluster`` value that names a file rather than a profile name."""
    return text.endswith(PROFILE_SUFFIX) or os.sep in text or "/" in text


def find_profile(name_or_path: str | Path, *, cwd: Path | None = None,
                 environ: dict[str, str] | None = None) -> Path:
    """The profile file for a name or path (see the module docstring for the order)."""
    text = str(name_or_path)
    if isinstance(name_or_path, Path) or is_profile_path(text):
        path = Path(text).expanduser()
        if not path.is_absolute() and cwd is not None:
            path = cwd / path
        if not path.is_file():
            raise InputNotFoundError(f"{path}: no such cluster profile file")
        return path
    if not _NAME_RE.match(text):
        raise ConfigError(f"--cluster {text!r}: not a profile name (letters, digits, '_', '-', '.') nor a path to a .toml file")
    dirs = profile_dirs(cwd=cwd, environ=environ)
    for d in dirs:
        path = d / f"{text}{PROFILE_SUFFIX}"
        if path.is_file():
            return path
    names = sorted(available_profiles(cwd=cwd, environ=environ))
    raise ConfigError(
        f"--cluster {text!r}: no cluster profile of that name in {', '.join(str(d) for d in dirs)}; "
        f"available: {', '.join(['local', 'threads', *[n for n in names if n not in ('local', 'threads')]])}, "
        f"or a scheduler address tcp://HOST:PORT, or a path to a .toml profile")


def read_profile(path: str | Path) -> ClusterProfile:
    """Read and validate one profile file."""
    document = read_toml(path, missing=f"{path}: no such cluster profile file")
    return parse_profile(document, source=str(path))


def load_profile(name_or_path: str | Path, *, cwd: Path | None = None,
                 environ: dict[str, str] | None = None) -> tuple[ClusterProfile, Path]:
    """Find, read and validate a profile; returns it with the file it came from."""
    path = find_profile(name_or_path, cwd=cwd, environ=environ)
    return read_profile(path), path
