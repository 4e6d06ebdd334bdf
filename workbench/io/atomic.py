"""Atomic writes: a file appears whole under its name or not at all."""

from __future__ import annotations

import json
import os
import shutil
import tempfile
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pandas as pd


def _default(o):
    if isinstance(o, np.integer):
        return int(o)
    if isinstance(o, np.floating):
        return None if not np.isfinite(o) else float(o)
    if isinstance(o, np.ndarray):
        return o.tolist()
    if isinstance(o, np.bool_):
        return bool(o)
    if isinstance(o, Path):
        return str(o)
    raise TypeError(f"cannot store {type(o).__name__} in JSON")


def _clean(o):
    if isinstance(o, float) and not np.isfinite(o):
        return None
    if isinstance(o, dict):
        return {str(k): _clean(v) for k, v in o.items()}
    if isinstance(o, list | tuple):
        return [_clean(v) for v in o]
    return o


def json_text(doc: dict) -> str:
    return json.dumps(_clean(doc), indent=2, default=_default, allow_nan=False) + "\n"


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def write_atomic(path: Path, write: Callable[[Path], None]) -> None:
    """Call ``write(tmp)`` on a temporary name beside ``path``, then move it into place.

    The file gets the usual permissions (0666 less the umask), not mkstemp's private 0600.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part", dir=path.parent)
    os.close(fd)
    tmp_path = Path(tmp)
    try:
        write(tmp_path)
        os.chmod(tmp_path, 0o666 & ~_umask())
        os.replace(tmp_path, path)
    finally:
        if tmp_path.exists():
            tmp_path.unlink()


def write_text(path: Path, text: str) -> None:
    write_atomic(path, lambda p: p.write_text(text, encoding="utf-8"))


def write_json(path: Path, doc: dict) -> None:
    write_text(path, json_text(doc))


def write_csv(path: Path, table: pd.DataFrame) -> None:
    write_atomic(path, lambda p: table.to_csv(p, index=False, float_format="%.10g"))


def swap_in(out: Path, fill: Callable[[Path], None]) -> None:
    """Fill a fresh sibling staging folder, then swap it in for ``out`` in two renames.

    Whoever calls this has checked that ``out`` may be replaced (see
    :func:`workbench.io.runfolder.check_replaceable`). A reader sees the old folder or the
    new one; if anything fails, the staging folder is removed and ``out`` is untouched.
    """
    out = Path(out)
    out.parent.mkdir(parents=True, exist_ok=True)
    staging = Path(tempfile.mkdtemp(prefix=f".{out.name}.", suffix=".part", dir=out.parent))
    os.chmod(staging, 0o777 & ~_umask())
    try:
        fill(staging)
        if out.exists():
            old = Path(tempfile.mkdtemp(prefix=f".{out.name}.", suffix=".old", dir=out.parent))
            old.rmdir()
            os.replace(out, old)
            try:
                os.replace(staging, out)
            except OSError:
                os.replace(old, out)  # put the old folder back
                raise
            shutil.rmtree(old, ignore_errors=True)
        else:
            os.replace(staging, out)
    finally:
        if staging.exists():
            shutil.rmtree(staging, ignore_errors=True)
