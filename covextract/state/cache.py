"""On-disk cache of coverage weights, keyed by what determines them.

The key is a fingerprint of the grid, the unit geometries (ids, WKB and the
parameters that shaped them), the pixel rule and the kernel and PROJ
versions. Files are ``.npz`` archives of plain arrays, read with
``allow_pickle=False``. The cache reveals where the units are: keep it with
the confidential inputs, never with outputs meant for sharing.
"""

from __future__ import annotations

import io
import warnings
import zipfile
from pathlib import Path

import numpy as np

from covextract.engine.coverage import KERNEL_VERSION
from covextract.engine.weights import WeightSet, weights_key
from covextract.errors import CacheWarning
from covextract.io.writers import atomic_write_bytes

__all__ = ["KERNEL_VERSION", "weights_key", "WeightCache"]


class WeightCache:
    """Weights stored as ``<folder>/weights/<key>.npz``.

    The counters tell a run's summary where its weight sets came from:
    ``builds`` (stored with :meth:`put`), ``loaded`` (read from a file) and
    ``reused`` (taken from memory again within the run); ``hits`` is
    ``loaded + reused``.

    Parameters
    ----------
    folder : Path or None
        The state folder; ``None`` disables the cache.
    """

    def __init__(self, folder) -> None:
        self.folder = Path(folder) / "weights" if folder is not None else None
        #: weight sets handed to :meth:`put`, i.e. built in this run
        self.builds = 0
        #: sets read from the state folder's files (made by an earlier run)
        self.loaded = 0
        #: times :meth:`get` returned a set already in memory (built or loaded earlier
        #: in this run); a brand-new folder can reuse its few sets many times
        self.reused = 0
        self._memo: dict = {}  # the last few weight sets of this run, also without a folder

    @property
    def hits(self) -> int:
        """Sets :meth:`get` returned, from the folder or from memory: ``loaded + reused``."""
        return self.loaded + self.reused

    def path(self, key: str) -> Path | None:
        """File of ``key``."""
        return None if self.folder is None else self.folder / f"{key}.npz"

    def get(self, key: str) -> WeightSet | None:
        """Load weights, or ``None`` when absent; a corrupt file warns and is ignored."""
        if key in self._memo:
            self.reused += 1
            return self._memo[key]
        path = self.path(key)
        if path is None or not path.exists():
            return None
        try:
            with np.load(path, allow_pickle=False) as data:
                ws = WeightSet.from_arrays({k: data[k] for k in data.files})
        except (OSError, ValueError, KeyError, zipfile.BadZipFile, EOFError) as exc:
            warnings.warn(
                f"weights cache file {path} is unreadable ({exc.__class__.__name__}); "
                "the weights are rebuilt",
                CacheWarning,
                stacklevel=2,
            )
            return None
        self.loaded += 1
        self._remember(key, ws)
        return ws

    def _remember(self, key: str, weights: WeightSet) -> None:
        self._memo[key] = weights
        while len(self._memo) > 4:
            self._memo.pop(next(iter(self._memo)))

    def put(self, key: str, weights: WeightSet) -> None:
        """Store weights atomically (in memory only when the cache has no folder)."""
        self.builds += 1
        self._remember(key, weights)
        path = self.path(key)
        if path is None:
            return
        buf = io.BytesIO()
        np.savez(buf, **weights.to_arrays())
        atomic_write_bytes(path, buf.getvalue())
