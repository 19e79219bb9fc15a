"""Fit cache: a cycle whose data and model settings are unchanged reuses its fits and figures.

Keys hash everything a fit depends on (input file hashes, the measure's outcome, type and formula,
the sampler settings and seed, the shrinkage spec, and the versions of fairgauge and of the fitting
libraries, and a hash of fairgauge's own fitting code: ``code_version``) and nothing it does not
(names, wording, templates, reporting thresholds), so changing only the words re-renders in seconds.
Entries are written atomically. The cache is local working data, never part of the site.
"""

from __future__ import annotations

import functools
import hashlib
import json
import os
import pickle
import tempfile
from dataclasses import asdict
from importlib import metadata
from pathlib import Path
from typing import Any

from pipeline import __version__

_LIBRARIES = ("numpy", "pandas", "statsmodels", "pymc", "nutpie", "arviz", "plotnine", "matplotlib")


@functools.lru_cache(maxsize=1)
def _versions() -> tuple:
    found = {"fairgauge": __version__}
    for name in _LIBRARIES:
        try:
            found[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            found[name] = "absent"
    return tuple(found.items())


# Modules whose code decides the fitted numbers: their source and their upper-case constants are
# part of every fit key, so an upgrade or a changed setting never reuses a stale fit.
FITTING_MODULES = (
    "casemix.benchmark",
    "casemix.model",
    "casemix.validation",
    "cycle",
    "fit_steps",
    "fitting",
    "inputs.data",
    "inputs.targets",
    "shrinkage.curves",
    "shrinkage.draws",
    "shrinkage.model",
    "shrinkage.sampling",
)


def code_version() -> str:
    """SHA-256 of the fitting code: each module's source plus the current values of its upper-case
    constants."""
    import importlib
    import inspect

    digest = hashlib.sha256()
    for name in FITTING_MODULES:
        module = importlib.import_module(f"{__package__}.{name}")
        digest.update(inspect.getsource(module).encode())
        constants = {
            k: v
            for k, v in vars(module).items()
            if k.isupper() and not callable(v) and _has_value(v)
        }
        digest.update(json.dumps(constants, sort_keys=True, default=repr).encode())
    return digest.hexdigest()


def _has_value(x: Any) -> bool:
    """False for an object whose text is only its type and memory address (a reporter, a lock):
    it would change the key in every process, so no cached fit could ever be reused."""
    return type(x).__repr__ is not object.__repr__


def library_versions() -> dict[str, str]:
    """fairgauge and the libraries its numbers and figures depend on (manifest and cache keys); read
    once per process."""
    return dict(_versions())


def cache_key(*parts: Any) -> str:
    """A stable hash of JSON-able parts plus the library versions."""

    def plain(x: Any) -> Any:
        if hasattr(x, "__dataclass_fields__"):
            return asdict(x)
        if isinstance(x, Path):
            return x.as_posix()
        return x

    text = json.dumps([library_versions(), *map(plain, parts)], sort_keys=True, default=str)
    return hashlib.sha256(text.encode()).hexdigest()


class Cache:
    """Pickled values and raw files under one folder; ``None`` folder means no caching."""

    def __init__(self, folder: Path | None):
        self.folder = folder
        self.hits = self.misses = 0

    def _path(self, name: str) -> Path:
        assert self.folder is not None
        return self.folder / name[:2] / name

    def load(self, name: str) -> Any | None:
        if self.folder is None:
            return None
        path = self._path(name + ".pkl")
        try:
            with path.open("rb") as fh:
                value = pickle.load(fh)
        except (OSError, pickle.UnpicklingError, EOFError, AttributeError, ImportError):
            self.misses += 1
            return None  # absent or unreadable: fit again
        self.hits += 1
        return value

    def store(self, name: str, value: Any) -> None:
        if self.folder is not None:
            self._write(
                self._path(name + ".pkl"), pickle.dumps(value, protocol=pickle.HIGHEST_PROTOCOL)
            )

    def file(self, name: str) -> Path | None:
        """Path of a cached raw file, if present."""
        if self.folder is None:
            return None
        path = self._path(name)
        return path if path.is_file() else None

    def store_file(self, name: str, source: Path) -> None:
        if self.folder is not None:
            self._write(self._path(name), source.read_bytes())

    def _write(self, path: Path, data: bytes) -> None:
        try:
            path.parent.mkdir(parents=True, exist_ok=True)
            fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=".part-")
            with os.fdopen(fd, "wb") as fh:
                fh.write(data)
            os.replace(tmp, path)
        except OSError:
            pass  # a cache that cannot be written only costs time
