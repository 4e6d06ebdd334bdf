"""Atomic writes: a file appears whole under its name or not at all.

Every CSV the tool writes goes through :func:`write_csv`, the one place where text cells
are made safe for spreadsheets (:func:`neutralise`); :func:`restore` undoes it on reading.
"""

from __future__ import annotations

import contextlib
import csv
import errno
import json
import os
import shutil
import signal
import tempfile
import threading
import time
from collections.abc import Callable, Iterator
from pathlib import Path

import numpy as np
import pandas as pd

from ..models.exceptions import DataError

#: A text cell starting with one of these is read by spreadsheets as a formula (OWASP's CSV
#: injection guidance lists =, +, -, @, tab and carriage return).
FORMULA_STARTS = ("=", "+", "-", "@", "\t", "\r")
#: The character put in front of such a cell so that spreadsheets show it as text.
FORMULA_GUARD = "'"


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


def _needs_guard(text: str) -> bool:
    # zero or more guards, then a formula start: guarded (so the rule can be undone exactly)
    return text.lstrip(FORMULA_GUARD)[:1] in FORMULA_STARTS and text[:1] != ""


def neutralise(value: object) -> object:
    """A text cell as written to CSV: one ``'`` in front when a spreadsheet would run it.

    The rule: a text that starts with ``=``, ``+``, ``-``, ``@``, a tab or a carriage
    return, possibly after one or more ``'``, gets one more ``'`` in front. Numbers are
    never changed. :func:`restore` removes exactly that one ``'``, so names round-trip.
    """
    if isinstance(value, str) and _needs_guard(value):
        return FORMULA_GUARD + value
    return value


def restore(value: object) -> object:
    """The text :func:`neutralise` was given."""
    if isinstance(value, str) and value[:1] == FORMULA_GUARD and _needs_guard(value[1:]):
        return value[1:]
    return value


#: what :func:`_needs_guard` finds, as a regular expression: guards, then a formula start
_GUARD_PATTERN = "^" + FORMULA_GUARD + "*[" + "".join(
    "\\" + c if c in "\\]^-[" else c for c in FORMULA_STARTS) + "]"


def _arrow_text(col: pd.Series):
    """A pyarrow-backed text column's cells as a pyarrow array (else ``None``)."""
    if isinstance(col.dtype, pd.StringDtype) and col.dtype.storage == "pyarrow":
        import pyarrow as pa

        return pa.array(col.array)
    return None


def _none_match(col: pd.Series, pattern: str) -> bool:
    """True when the column is pyarrow-backed text and no cell matches ``pattern``; False
    means "look cell by cell" (a match, or a column this shortcut does not read)."""
    text = _arrow_text(col)
    if text is None:
        return False
    import pyarrow.compute as pc

    return not pc.any(pc.match_substring_regex(text, pattern)).as_py()


def safe_for_spreadsheets(table: pd.DataFrame) -> pd.DataFrame:
    """The table with every text cell neutralised (a copy only when something changes)."""
    columns = {}
    for name in table.columns:
        col = table[name]
        if col.dtype.kind == "O" or str(col.dtype) in ("string", "str"):
            if _none_match(col, _GUARD_PATTERN):
                continue  # the cell-by-cell test below would find nothing either
            values = col.to_numpy(dtype=object)
            if any(isinstance(v, str) and _needs_guard(v) for v in values):
                columns[name] = pd.Series([neutralise(v) for v in values], index=col.index,
                                          dtype=object)
    if not columns:
        return table
    out = table.copy()
    for name, col in columns.items():
        out[name] = col
    return out


def write_csv(path: Path, table: pd.DataFrame) -> None:
    """A CSV, atomically, with spreadsheet formulas neutralised (see :func:`neutralise`)."""
    safe = safe_for_spreadsheets(table)
    names = [neutralise(str(c)) for c in safe.columns]
    if names != [str(c) for c in safe.columns]:
        safe = safe.set_axis(names, axis=1)
    # a carriage return inside a cell is not quoted by the minimal rule (the line ends are
    # "\n"), which would split the row for every reader: such files quote all text cells
    quoting = csv.QUOTE_NONNUMERIC if _has_carriage_return(safe) else csv.QUOTE_MINIMAL
    write_atomic(path, csv_writer(safe, quoting))


#: tables with fewer rows keep pandas' writer (fast enough there, and no compiled kernel)
FAST_CSV_MIN_ROWS = 20_000


def csv_writer(table: pd.DataFrame, quoting: int) -> Callable[[Path], None]:
    """What writes ``table`` as ``table.to_csv(index=False, float_format="%.10g",
    quoting=quoting)`` would: :mod:`workbench.io.fast_csv` (same bytes) for a long table it
    handles, pandas itself for the rest."""
    if len(table) >= FAST_CSV_MIN_ROWS:
        from . import fast_csv

        plan = fast_csv.plan(table, quoting)
        if plan is not None:
            return plan.write
    return lambda p: table.to_csv(p, index=False, float_format="%.10g", quoting=quoting)


def _has_carriage_return(table: pd.DataFrame) -> bool:
    if any("\r" in str(c) for c in table.columns):
        return True
    for name in table.columns:
        col = table[name]
        if col.dtype.kind == "O" or str(col.dtype) in ("string", "str"):
            if _none_match(col, "\r"):
                continue
            if any(isinstance(v, str) and "\r" in v for v in col.to_numpy(dtype=object)):
                return True
    return False


@contextlib.contextmanager
def signals_held() -> Iterator[None]:
    """SIGINT and SIGTERM wait until the block ends (so a folder swap is never half done)."""
    if threading.current_thread() is not threading.main_thread() or not hasattr(
            signal, "pthread_sigmask"):
        yield
        return
    held = {signal.SIGINT, signal.SIGTERM}
    before = signal.pthread_sigmask(signal.SIG_BLOCK, held)
    try:
        yield
    finally:
        signal.pthread_sigmask(signal.SIG_SETMASK, before)


def staging_name(out: Path, suffix: str) -> Path:
    """A fresh sibling folder ``.NAME.PID.XXXX.part`` (the PID lets a later run see it died)."""
    return Path(tempfile.mkdtemp(prefix=f".{out.name}.{os.getpid()}.", suffix=suffix,
                                 dir=out.parent))


#: how many times a swap is retried when another writer finished at the same moment
SWAP_ATTEMPTS = 5


def swap_in(out: Path, fill: Callable[[Path], None]) -> None:
    """Fill a fresh sibling staging folder, then swap it in for ``out`` in two renames.

    Whoever calls this has checked that ``out`` may be replaced (see
    :func:`workbench.io.runfolder.check_replaceable`). A reader sees the old folder or the
    new one; if anything fails, the staging folder is removed and ``out`` is untouched.
    The renames run with SIGINT/SIGTERM held, so an interrupt lands before or after them.
    When two writers finish together, the last one's folder stays (as if they had run one
    after the other) and neither fails.
    """
    out = Path(out)
    out.parent.mkdir(parents=True, exist_ok=True)
    staging = staging_name(out, ".part")
    os.chmod(staging, 0o777 & ~_umask())
    try:
        fill(staging)
        with signals_held():
            _swap(out, staging)
    finally:
        if staging.exists():
            shutil.rmtree(staging, ignore_errors=True)


def _swap(out: Path, staging: Path) -> None:
    olds = []
    try:
        for _ in range(SWAP_ATTEMPTS):
            if out.exists() or out.is_symlink():
                old = staging_name(out, ".old")
                old.rmdir()
                try:
                    os.replace(out, old)
                    olds.append(old)
                except FileNotFoundError:  # another writer moved it first
                    pass
            try:
                os.replace(staging, out)
                return
            except OSError as exc:
                if exc.errno not in (errno.ENOTEMPTY, errno.EEXIST):
                    if olds and not out.exists():
                        os.replace(olds.pop(), out)  # put the old folder back
                    raise DataError(
                        f"cannot put the new folder in place of {str(out)!r}"
                        f" ({exc.strerror}); the old one is unchanged."
                    ) from exc
                # another writer put its folder there between our two renames: again
        raise DataError(
            f"{str(out)!r} kept being replaced by other runs at the same moment; run again."
        )
    finally:
        for old in olds:
            shutil.rmtree(old, ignore_errors=True)


def _copy_linked(src: Path, dst: Path) -> None:
    """Copy a folder's files into ``dst``: hard links where the file system allows.

    Safe because no file of a run folder is ever changed in place: every write is a new
    file renamed over the old name, which breaks the link.
    """
    for item in src.iterdir():
        if item.name.startswith("."):
            continue
        target = dst / item.name
        if item.is_dir():
            shutil.copytree(item, target, copy_function=_link_or_copy)
        else:
            _link_or_copy(item, target)


def _link_or_copy(src, dst) -> None:
    try:
        os.link(src, dst)
    except OSError:
        shutil.copy2(src, dst)


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except (PermissionError, OSError):
        return True
    return True


def clean_staging(parent: str | Path, name: str, *, age: float = 60.0) -> list[Path]:
    """Remove staging folders a killed run left beside ``parent/name``.

    A staging folder is ``.NAME.PID.XXXX.part`` (or ``.old``): it is removed when its
    process is gone, or, without a readable PID, when it is older than ``age`` seconds.
    A live writer's staging folder is never touched.
    """
    parent = Path(parent)
    removed = []
    if not parent.is_dir():
        return removed
    now = time.time()
    for p in parent.glob(f".{glob_escape(name)}.*"):
        if p.suffix not in (".part", ".old") or not p.is_dir() or p.is_symlink():
            continue
        rest = p.name[len(name) + 2:].split(".")
        try:
            pid = int(rest[0]) if len(rest) >= 3 else None
        except ValueError:
            pid = None
        try:
            stale = (not _pid_alive(pid)) if pid is not None and pid != os.getpid() else (
                pid is None and now - p.stat().st_mtime > age)
            if stale:
                shutil.rmtree(p, ignore_errors=True)
                removed.append(p)
        except OSError:
            continue
    return removed


def glob_escape(text: str) -> str:
    """``text`` with glob's special characters taken literally."""
    import glob

    return glob.escape(text)
