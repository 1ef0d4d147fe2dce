"""The report's file cache: figures, copied images, audit texts and QC numbers.

Every cached file is named by a key: the sha256 of what it shows (the lineage
hashes of the maps in a figure, or the numbers of a QC plot) and of the code
version that drew it. A file whose name exists is reused, never redrawn. The
cache folder sits beside the pages and is not an output Snakemake knows of, so
a rerun of the report job does not delete it; files no page refers to any
more are removed at the end of each run (:meth:`FileCache.prune`).
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
from collections.abc import Callable
from pathlib import Path
from typing import Any

from ..fileio import atomic_path, write_json, write_text
from ..provenance import canonical_json

#: Bump when a figure's look changes, so that cached figures are redrawn.
FIGURE_VERSION = 3
#: Versions of the other cached kinds (bump when what they hold changes).
KIND_VERSIONS: dict[str, int] = {"audit": 1, "run-qc": 1, "definition": 1, "copy": 1}


def cache_key(kind: str, content: Any) -> str:
    """Hex key (24 digits) of a cached item: its kind, the code version and what it shows.

    Parameters
    ----------
    kind : str
        E.g. ``mosaic``, ``qc``, ``audit``.
    content : JSON-serialisable
        Lineage hashes and settings (or the numbers) the item depends on.

    Examples
    --------
    >>> cache_key("mosaic", {"lineage": "ab"}) == cache_key("mosaic", {"lineage": "ab"})
    True
    >>> cache_key("mosaic", {"lineage": "ab"}) == cache_key("mosaic", {"lineage": "ac"})
    False
    """
    payload = canonical_json({"kind": kind, "version": KIND_VERSIONS.get(kind, FIGURE_VERSION), "content": content})
    return hashlib.sha256(payload.encode("utf-8")).hexdigest()[:24]


class FileCache:
    """Cached files in one folder, with counts of what was made and reused.

    Parameters
    ----------
    folder : path-like
        The cache folder (created when needed).

    Attributes
    ----------
    drawn : list of str
        Names of figures drawn in this run.
    reused : list of str
        Names of cached files reused.
    copied : list of str
        Names of images copied (or hard-linked) in this run.
    written : list of str
        Names of text files written in this run.
    """

    def __init__(self, folder: str | os.PathLike[str]) -> None:
        self.folder = Path(folder)
        self.drawn: list[str] = []
        self.reused: list[str] = []
        self.copied: list[str] = []
        self.written: list[str] = []
        self._used: set[str] = set()

    def path(self, name: str) -> Path:
        """Where a cached file of this name lives."""
        return self.folder / name

    def _hit(self, name: str) -> Path | None:
        self._used.add(name)
        target = self.path(name)
        if target.is_file():
            self.reused.append(name)
            return target
        self.folder.mkdir(parents=True, exist_ok=True)
        return None

    def keep(self, name: str) -> bool:
        """Mark an existing cached file as used (reused); False when it does not exist."""
        return self._hit(name) is not None

    def record_written(self, name: str) -> None:
        """Note a file the caller wrote into the cache folder itself."""
        self._used.add(name)
        self.written.append(name)

    def figure(self, name: str, draw: Callable[[Path], None]) -> Path:
        """The cached figure ``name``, drawn by ``draw(path)`` only when it does not exist.

        ``draw`` must write the file at the given path (atomically).
        """
        hit = self._hit(name)
        if hit is not None:
            return hit
        target = self.path(name)
        draw(target)
        self.drawn.append(name)
        return target

    def figure_with_meta(self, name: str, draw: Callable[[Path], dict[str, Any]]) -> tuple[Path, dict[str, Any]]:
        """Like :meth:`figure`, for a figure that comes with facts the page shows (its colour scale...).

        ``draw(path)`` writes the figure and returns a JSON-ready mapping, kept
        beside it as ``<name>.json`` and returned again on a cache hit.
        """
        meta_name = name + ".json"
        self._used.update((name, meta_name))
        target, meta_path = self.path(name), self.path(meta_name)
        if target.is_file() and meta_path.is_file():
            self.reused.append(name)
            return target, json.loads(meta_path.read_text(encoding="utf-8"))
        self.folder.mkdir(parents=True, exist_ok=True)
        meta = draw(target)
        write_json(meta_path, meta)
        self.drawn.append(name)
        return target, meta

    def copy(self, name: str, source: str | os.PathLike[str]) -> Path:
        """A copy of ``source`` under ``name`` (a hard link where the file system allows)."""
        hit = self._hit(name)
        if hit is not None:
            return hit
        target = self.path(name)
        with atomic_path(target) as tmp:
            try:
                os.link(source, tmp)
            except OSError:
                shutil.copyfile(source, tmp)
        self.copied.append(name)
        return target

    def text(self, name: str, make: Callable[[], str]) -> tuple[Path, str]:
        """The cached text ``name`` (made by ``make()`` when missing) and its content."""
        hit = self._hit(name)
        if hit is not None:
            return hit, hit.read_text(encoding="utf-8")
        content = make()
        target = self.path(name)
        write_text(target, content)
        self.written.append(name)
        return target, content

    def prune(self) -> list[str]:
        """Delete the cached files this run did not use; return their names."""
        removed: list[str] = []
        if not self.folder.is_dir():
            return removed
        for entry in sorted(self.folder.iterdir()):
            if entry.is_file() and entry.name not in self._used and not entry.name.startswith("."):
                entry.unlink()
                removed.append(entry.name)
        return removed
