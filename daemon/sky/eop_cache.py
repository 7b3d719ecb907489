"""The bundled Earth-orientation table, parsed once and kept on disk in a per-user cache.

Astropy parses the bundled IERS-A "finals" file (about 20 000 fixed-width lines) with its
generic ASCII reader each time a process first needs UT1-UTC or polar motion: 0.6-1.8 s on a
small computer, on the path to the first observed block. The parsed table's columns are the
same every time as long as the installed astropy and astropy-iers-data are, so the columns
astropy's look-ups read are saved once as a NumPy archive and, in later processes, the table
(same values, units, masks and metadata: the same numbers astropy would use) is rebuilt from it in milliseconds and
handed to astropy (``iers.IERS_Auto.iers_table``), so every transform keeps astropy's own
precision.

Where: ``$XDG_CACHE_HOME/spinflip`` or else ``~/.cache/spinflip``, file ``eop-<key>.npz``.
Deleting the folder is always safe (it is rebuilt on the next start).

Trust: the file name holds a key made from the astropy and astropy-iers-data versions and
the bundled file's path, size and modification time, so an upgrade makes a new file (older
ones are removed). Inside, the key and a SHA-256 digest of the arrays are checked again; a
file that fails to load or to check is ignored, logged once, and rebuilt. The file is written
to a temporary name and renamed (atomic); a folder that cannot be written only costs the
parse in every process. A missing file is made by a child process (``python -m
spinflip.daemon.sky.eop_cache``), so the parser's memory never stays in the daemon; should
that fail, the table is parsed in-process.
"""

from __future__ import annotations

import contextlib
import hashlib
import io
import json
import logging
import os
import subprocess
import sys
import tempfile
from importlib import metadata
from pathlib import Path
from typing import Any

import numpy as np

log = logging.getLogger("spinflip.frames")

#: Format of the archive; bump it when the layout below changes.
_FORMAT = 2
#: The columns astropy's look-ups read (``IERS.ut1_utc``, ``pm_xy``, ``dcip_xy`` and their
#: status flags, by date): the IERS-A and IERS-B source columns (``*_A``, ``*_B``, errors)
#: are only used while astropy combines them at parse time, so they are not kept (4 MB less
#: of a daemon's memory).
KEPT_COLUMNS = ("MJD", "UT1_UTC", "UT1Flag", "PM_x", "PM_y", "PolPMFlag", "dX_2000A",
                "dY_2000A", "NutFlag")


def cache_dir() -> Path:
    """The per-user cache folder: ``$XDG_CACHE_HOME/spinflip`` or ``~/.cache/spinflip``."""
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return Path(base) / "spinflip"


def _version(name: str) -> str:
    try:
        return metadata.version(name)
    except metadata.PackageNotFoundError:
        return "none"


def bundled_file() -> str:
    """Path of the IERS-A file astropy reads when nothing is downloaded."""
    from astropy.utils.iers import IERS_A_FILE
    return str(IERS_A_FILE)


def cache_key() -> str:
    """A short key naming what the cached table was parsed from (versions and the file)."""
    path = bundled_file()
    try:
        st = os.stat(path)
        stamp = f"{st.st_size}:{st.st_mtime_ns}"
    except OSError:
        stamp = "missing"
    text = "|".join([str(_FORMAT), _version("astropy"), _version("astropy-iers-data"),
                     path, stamp])
    return hashlib.sha256(text.encode()).hexdigest()[:16]


def cache_path(key: str | None = None) -> Path:
    """The cache file for ``key`` (default: the installed packages' key)."""
    return cache_dir() / f"eop-{key or cache_key()}.npz"


def _digest(arrays: dict[str, np.ndarray]) -> str:
    h = hashlib.sha256()
    for name in sorted(arrays):
        a = np.ascontiguousarray(arrays[name])
        h.update(name.encode())
        h.update(str(a.dtype).encode())
        h.update(str(a.shape).encode())
        h.update(a.tobytes())
    return h.hexdigest()


def _to_arrays(table: object, key: str) -> dict[str, np.ndarray]:
    """The table's columns (data, unit, mask) and metadata as plain arrays."""
    arrays: dict[str, np.ndarray] = {}
    columns: list[dict[str, bool | str | None]] = []
    for name in KEPT_COLUMNS:
        col = table[name]  # type: ignore[index]
        unit = getattr(col, "unit", None)
        data = np.asarray(getattr(col, "value", col) if unit is not None else col)
        mask = getattr(col, "mask", None)
        arrays[f"c{len(columns)}"] = np.array(data)
        has_mask = mask is not None and np.ndim(mask) > 0
        if has_mask:
            arrays[f"m{len(columns)}"] = np.asarray(mask, dtype=bool)
        columns.append({"name": name, "unit": None if unit is None else str(unit),
                        "masked": bool(has_mask)})
    meta = {k: (v.item() if isinstance(v, np.generic) else v)
            for k, v in table.meta.items()}  # type: ignore[attr-defined]
    header = {"format": _FORMAT, "key": key, "columns": columns, "meta": meta}
    arrays["header"] = np.array(json.dumps(header))
    arrays["digest"] = np.array(_digest(arrays))
    return arrays


def _from_arrays(arrays: dict[str, np.ndarray], key: str) -> object:
    """Rebuild astropy's table; raise ValueError when the arrays are not a sound cache."""
    from astropy import units as u
    from astropy.table import MaskedColumn
    from astropy.utils import iers

    digest = str(arrays.pop("digest"))
    if _digest(arrays) != digest:
        raise ValueError("digest mismatch")
    header = json.loads(str(arrays["header"]))
    if header.get("format") != _FORMAT or header.get("key") != key:
        raise ValueError("key mismatch")
    names, cols = [], []
    n = None
    for i, c in enumerate(header["columns"]):
        data = arrays[f"c{i}"]
        if n is None:
            n = len(data)
        if data.ndim != 1 or len(data) != n:
            raise ValueError(f"column {c['name']} has the wrong shape")
        if c["unit"] is not None:
            col: object = u.Quantity(data, u.Unit(c["unit"]), copy=False)
        elif c["masked"]:
            col = MaskedColumn(data, mask=arrays[f"m{i}"], name=c["name"])
        else:
            col = data
        names.append(c["name"])
        cols.append(col)
    if tuple(names) != KEPT_COLUMNS:
        raise ValueError("columns differ")
    table = iers.IERS_Auto(cols, names=names, meta=header["meta"], copy=False)
    return table


def _read(path: Path, key: str) -> object | None:
    try:
        with np.load(path, allow_pickle=False) as z:
            arrays = {name: z[name] for name in z.files}
        return _from_arrays(arrays, key)
    except FileNotFoundError:
        return None
    except Exception as exc:  # noqa: BLE001 - any fault in a cache file means: rebuild it
        log.info("Earth-orientation cache %s unusable (%s): rebuilding it", path, exc)
        return None


def _write(path: Path, arrays: dict[str, np.ndarray]) -> None:
    """Write atomically (temporary file in the same folder, fsync, rename); never raise."""
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        buf = io.BytesIO()
        save: Any = np.savez        # numpy's stubs take the keywords for flags
        save(buf, **arrays)
        fd, tmp = tempfile.mkstemp(prefix=".eop-", suffix=".tmp", dir=path.parent)
        try:
            with os.fdopen(fd, "wb") as f:
                f.write(buf.getvalue())
                f.flush()
                os.fsync(f.fileno())
            os.replace(tmp, path)
        except BaseException:
            with contextlib.suppress(OSError):
                os.unlink(tmp)
            raise
        for old in path.parent.glob("eop-*.npz"):   # tables of earlier package versions
            if old != path:
                with contextlib.suppress(OSError):
                    old.unlink()
    except OSError as exc:
        log.info("Earth-orientation cache not written to %s (%s); parsing each start", path, exc)


#: Parse in a child process when the cache is missing: the parser's tables and modules (some
#: 60 MB) then never stay in the daemon's memory, even at the first start after an upgrade.
PARSE_IN_CHILD = True


def _build_in_child() -> bool:
    """Parse and cache the table in a child Python; True when it says it wrote the file."""
    try:
        done = subprocess.run([sys.executable, "-m", "spinflip.daemon.sky.eop_cache"],
                              capture_output=True, text=True, timeout=300)
    except (OSError, subprocess.SubprocessError) as exc:
        log.info("Earth-orientation table not parsed in a child process (%s)", exc)
        return False
    return done.returncode == 0


def build() -> bool:
    """Parse astropy's bundled table and write the cache file; True when it was written."""
    from astropy.utils import iers

    iers.conf.auto_download = False      # as in spinflip.daemon.sky.coordinates
    iers.conf.auto_max_age = None
    key = cache_key()
    path = cache_path(key)
    _write(path, _to_arrays(iers.IERS_Auto.read(), key))
    return path.is_file()


def load_table() -> object:
    """Astropy's parsed IERS table, from the cache when sound, else parsed and cached.

    Returns
    -------
    astropy.utils.iers.IERS_Auto : the table astropy's own ``IERS_Auto.open()`` returns,
    with the columns :data:`KEPT_COLUMNS`.
    """
    from astropy.utils import iers

    key = cache_key()
    path = cache_path(key)
    table = _read(path, key)
    if table is None and PARSE_IN_CHILD and _build_in_child():
        table = _read(path, key)
    if table is None:
        arrays = _to_arrays(iers.IERS_Auto.read(), key)
        _write(path, arrays)
        table = _from_arrays(dict(arrays), key)   # the same table, cached or not
    return table


def install() -> None:
    """Hand astropy the cached table unless it already holds one (idempotent, cheap)."""
    from astropy.utils import iers

    if iers.IERS_Auto.iers_table is None:
        iers.IERS_Auto.iers_table = load_table()


if __name__ == "__main__":    # the child of _build_in_child: exit 0 when the file was written
    import warnings

    warnings.simplefilter("ignore")
    sys.exit(0 if build() else 1)
