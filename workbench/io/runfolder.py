"""The run folder: its one schema, its one writer, its one reader and its one updater.

Every file name of a run folder, the columns that hold text, and the schema version of
run.json live here and nowhere else. Every command that writes a folder goes through
:func:`write_folder` (a new run) or :func:`update_folder` (rank, predict, check, report on an
existing run), and both replace the folder whole, in one rename: a reader sees the old folder
or the new one, never a mixture. A folder that would describe other settings than its
run.json is not allowed to exist: the updater is handed the step that re-renders the report
(or removes it, saying how to rebuild it), and run.json lists every step that shaped the
folder, so its reproduce command is complete.

A folder is replaced only when it is provably one this tool wrote: its run.json parses, names
the tool and a schema this code knows, and the folder holds no file that run.json does not
list (a project folder that happens to hold a file named run.json is never touched).
"""

from __future__ import annotations

import json
import os
import shutil
import time
import warnings
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd

from ..models.exceptions import DataError
from . import atomic

#: run.json's "workbench_run": the schema of the folder this code writes and reads.
SCHEMA_VERSION = 2
#: run.json's "tool": who wrote the folder.
TOOL = "workbench"

#: every file a run folder may hold, by the name the code uses for it
FILES: dict[str, str] = {
    "record": "run.json",
    "estimates": "estimates.csv",
    "population": "population.csv",
    "population_draws": "population_draws.csv",
    "diagnostics": "diagnostics.json",
    "posterior": "posterior.nc",
    "not_final": "NOT-FINAL.txt",
    "parents": "parents.csv",
    "verification": "verification.csv",
    "ranks": "ranks.csv",
    "pairwise": "pairwise.csv",
    "funnel": "funnel.csv",
    "funnel_curve": "funnel_curve.csv",
    "trials_needed": "trials_needed.csv",
    "targets": "targets.json",
    "checks": "checks.json",
    "ppc_statistics": "ppc_statistics.csv",
    "group_checks": "group_checks.csv",
    "predictions": "predictions.csv",
    "report": "report.html",
    "figures": "figures",
}
#: the files of a comparison folder (``workbench compare``), beside one run folder per model
COMPARISON_FILES: dict[str, str] = {
    "comparison": "comparison.json",
    "comparison_table": "comparison.csv",
    "comparison_pointwise": "comparison_pointwise.csv",
}
#: the tables of a run folder (CSV) and its documents (JSON), by name
TABLES = tuple(k for k, v in FILES.items() if v.endswith(".csv"))
DOCUMENTS = tuple(k for k, v in FILES.items() if v.endswith(".json") and k != "record")
#: files a later step derives from the tables: rewritten or removed when the tables change
DERIVED = ("report", "figures")
#: the step that writes them, as a user types it
REPORT_STEP = "workbench report {folder}"

#: columns read as text whatever they hold ("NA" and "1" stay names)
TEXT_COLUMNS = (
    "group",
    "group_a",
    "group_b",
    "parent",
    "status",
    "target_flag",
    "outside_95",
    "outside_998",
    "model",
    "run",
    "engine",
    "preference",
    "loo_method",
    "quantity",
    "statistic",
    "verdict",
)


def path_of(folder: str | Path, name: str) -> Path:
    """The path of one of :data:`FILES` (or :data:`COMPARISON_FILES`) in ``folder``."""
    return Path(folder) / (FILES.get(name) or COMPARISON_FILES[name])


def read_table(path: str | Path) -> pd.DataFrame:
    """A run-folder CSV: names kept as text, blanks as missing, nothing else changed."""
    path = Path(path)
    header = pd.read_csv(path, nrows=0).columns
    dtype = {c: str for c in header if c in TEXT_COLUMNS}
    return pd.read_csv(path, dtype=dtype, keep_default_na=False, na_values=[""])


def _read_json(path: Path) -> dict:
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise DataError(
            f"{str(path)!r} is damaged ({type(exc).__name__}: {str(exc)[:80]}); rebuild the"
            " run folder with 'workbench fit'."
        ) from exc
    if not isinstance(doc, dict):
        raise DataError(f"{str(path)!r} is damaged (not a JSON object); rebuild the run folder.")
    return doc


# -- what a folder holds -------------------------------------------------------------------------


@dataclass
class FolderContents:
    """A run folder as read back: its record, tables, documents and (on demand) posterior."""

    path: Path
    record: dict
    tables: dict[str, pd.DataFrame] = field(default_factory=dict)
    documents: dict[str, dict] = field(default_factory=dict)
    _idata: object = None

    @property
    def final(self) -> bool:
        return bool(self.record.get("final"))

    @property
    def settings(self) -> dict:
        return self.record.get("settings") or {}

    @property
    def estimates(self) -> pd.DataFrame:
        return self.tables["estimates"]

    @property
    def diagnostics(self) -> dict:
        return self.documents.get("diagnostics", {})

    @property
    def idata(self):
        """The posterior (ArviZ InferenceData), read from posterior.nc on first use."""
        if self._idata is None:
            self._idata = read_posterior(self.path)
        return self._idata


def is_run_folder(path: str | Path) -> bool:
    """True when ``path`` holds a run.json this tool wrote (any schema)."""
    record = Path(path) / FILES["record"]
    if not record.is_file():
        return False
    try:
        doc = json.loads(record.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError):
        return False
    return isinstance(doc, dict) and "workbench_run" in doc


def read_folder(path: str | Path, *, tables: tuple[str, ...] | None = None) -> FolderContents:
    """Read a run folder's record, documents and tables (all, or the named ones).

    Raises
    ------
    DataError
        The folder is not a run folder, or a file in it is damaged (named, with the fix).
    """
    path = Path(path)
    record_path = path_of(path, "record")
    if not path.is_dir() or not record_path.exists() or not path_of(path, "estimates").exists():
        raise DataError(
            f"{str(path)!r} is not a run folder (no {FILES['record']} or {FILES['estimates']});"
            " give a folder written by 'workbench fit' or 'workbench demo'."
        )
    record = _read_json(record_path)
    if "workbench_run" not in record:
        raise DataError(
            f"{str(record_path)!r} was not written by workbench (no 'workbench_run' key); give a"
            " folder written by 'workbench fit'."
        )
    contents = FolderContents(path, record)
    for name in DOCUMENTS:
        p = path_of(path, name)
        if p.exists():
            contents.documents[name] = _read_json(p)
    for name in tables or TABLES:
        p = path_of(path, name)
        if p.exists():
            try:
                contents.tables[name] = read_table(p)
            except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as exc:
                raise DataError(
                    f"{str(p)!r} is damaged ({type(exc).__name__}); rebuild the run folder with"
                    " 'workbench fit'."
                ) from exc
    groups = (record.get("input") or {}).get("groups")
    if groups is not None and len(contents.tables.get("estimates", ())) != groups:
        raise DataError(
            f"{str(path_of(path, 'estimates'))!r} has {len(contents.estimates)} rows but run.json"
            f" records {groups} groups; the folder is damaged: rebuild it with 'workbench fit'."
        )
    return contents


def read_posterior(path: str | Path):
    """posterior.nc of a run folder as ArviZ InferenceData, loaded into memory."""
    nc = path_of(path, "posterior")
    if not nc.exists():
        raise DataError(f"{str(nc)!r} is missing; rebuild the run folder with 'workbench fit'.")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        import arviz as az

        try:
            idata = az.from_netcdf(str(nc), engine="h5netcdf")
            idata.load() if hasattr(idata, "load") else None
        except Exception as exc:  # h5py/xarray raise many kinds on a damaged file
            raise DataError(
                f"{str(nc)!r} is damaged ({type(exc).__name__}); rebuild the run folder with"
                " 'workbench fit'."
            ) from exc
    return idata


# -- writing ----------------------------------------------------------------------------------------


def _listed(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.iterdir() if not p.name.startswith("."))


def check_replaceable(out: str | Path, *, kind: str = "run", marker: str | None = None) -> None:
    """DataError unless ``out`` may be replaced: absent, empty, or a folder this tool wrote.

    A run folder is recognised by its run.json (tool, schema) and may hold only the files it
    lists; a comparison folder by ``marker`` (comparison.json) beside run folders.
    """
    out = Path(out)
    if out.is_symlink() and not out.exists():
        raise DataError(f"--out {str(out)!r} is a dangling symbolic link; give a real folder.")
    if not out.exists():
        parent = out.resolve().parent
        if parent.exists() and not os.access(parent, os.W_OK | os.X_OK):
            raise DataError(f"--out {str(out)!r}: cannot write in {str(parent)!r}; choose another.")
        return
    if out.is_symlink():
        raise DataError(
            f"--out {str(out)!r} is a symbolic link; give the folder it points to, or a new one."
        )
    if not out.is_dir():
        raise DataError(f"--out {str(out)!r} is a file; give a folder for the {kind}.")
    if out.resolve() == Path.cwd().resolve() or out.resolve() == out.resolve().parent:
        raise DataError(f"--out {str(out)!r} is the working folder; give a folder of its own.")
    present = _listed(out)
    if not present:
        return
    if marker is not None:
        if (out / marker).exists():
            return
        raise DataError(
            f"--out {str(out)!r} exists and is not a {kind} folder; choose a new folder."
        )
    if not is_run_folder(out):
        raise DataError(
            f"--out {str(out)!r} exists and is not a run folder written by workbench; choose a"
            " new folder."
        )
    record = _read_json(out / FILES["record"])
    foreign = [n for n in present if n not in set(record.get("files", [])) | {FILES["record"]}]
    if foreign:
        raise DataError(
            f"--out {str(out)!r} holds files workbench did not write ({', '.join(foreign[:5])});"
            " move them away or choose a new folder."
        )


def replace_folder(out: str | Path, fill: Callable[[Path], None], *, kind: str = "run",
                   marker: str | None = None) -> Path:
    """Fill a fresh sibling staging folder, then swap it in for ``out``; the old one goes."""
    out = Path(out)
    check_replaceable(out, kind=kind, marker=marker)
    atomic.swap_in(out, fill)
    return out


@dataclass
class FolderParts:
    """What a new run folder holds, as the analysis computed it (nothing written yet)."""

    record: dict
    tables: Mapping[str, pd.DataFrame]
    documents: Mapping[str, dict]
    idata: object
    texts: Mapping[str, str] = field(default_factory=dict)


def _fill(folder: Path, parts: FolderParts) -> None:
    for name, table in parts.tables.items():
        atomic.write_csv(path_of(folder, name), table)
    for name, doc in parts.documents.items():
        atomic.write_json(path_of(folder, name), doc)
    for name, text in parts.texts.items():
        atomic.write_text(path_of(folder, name), text)
    if parts.idata is not None:
        write_posterior(path_of(folder, "posterior"), parts.idata)


def write_posterior(path: Path, idata) -> None:
    """posterior.nc, uncompressed (compression cost more time than it saved space)."""
    atomic.write_atomic(
        path, lambda p: idata.to_netcdf(str(p), engine="h5netcdf", compress=False)
    )


def _finish_record(folder: Path, record: dict) -> dict:
    record = {**record, "workbench_run": SCHEMA_VERSION, "tool": TOOL}
    record["files"] = sorted({*_listed(folder), FILES["record"]})
    atomic.write_json(path_of(folder, "record"), record)
    return record


def write_folder(out: str | Path, parts: FolderParts,
                 then: Callable[[Path], None] | None = None) -> Path:
    """Write a new run folder atomically: every file, then ``then(staging)`` (the report)."""

    def fill(staging: Path) -> None:
        _fill(staging, parts)
        _finish_record(staging, parts.record)
        if then is not None:
            then(staging)
            _finish_record(staging, _read_json(path_of(staging, "record")))

    return replace_folder(out, fill)


def step_entry(command: str | None, what: str) -> dict:
    """One entry of run.json's "steps": the command (None from Python) and what it did."""
    return {"command": command, "what": what, "at": time.strftime("%Y-%m-%dT%H:%M:%S%z")}


def update_folder(
    path: str | Path,
    *,
    tables: Mapping[str, pd.DataFrame] | None = None,
    documents: Mapping[str, dict] | None = None,
    remove: tuple[str, ...] = (),
    record: Mapping[str, object] | None = None,
    step: dict | None = None,
    derived: Callable[[Path], str] | None = None,
    then: Callable[[Path], object] | None = None,
) -> dict:
    """Change an existing run folder as a whole: either all of the change lands or none.

    The folder is copied to a staging folder (hard links for unchanged files), changed there,
    and swapped in. ``record`` updates run.json's keys; ``step`` is appended to its "steps".
    When the tables change and the folder holds a report, ``derived(staging)`` rewrites it
    (returning a note); without ``derived`` the report and figures are removed and run.json
    notes how to rebuild them. ``then(staging)`` runs last, whatever changed (the report
    step itself). Returns the new run.json.
    """
    path = Path(path)
    old = read_folder(path, tables=())
    new_record = {**old.record, **(record or {})}
    if step is not None:
        new_record["steps"] = [*old.record.get("steps", []), step]

    def fill(staging: Path) -> None:
        _copy_linked(path, staging)
        for name in remove:
            target = path_of(staging, name)
            if target.is_dir():
                shutil.rmtree(target)
            elif target.exists():
                target.unlink()
        _fill(staging, FolderParts(new_record, tables or {}, documents or {}, None))
        had_report = path_of(staging, "report").exists()
        changed = bool(tables or documents or remove)
        _finish_record(staging, new_record)
        if changed and had_report:
            if derived is not None:
                note = derived(staging)
            else:
                for name in DERIVED:
                    target = path_of(staging, name)
                    shutil.rmtree(target) if target.is_dir() else target.unlink(missing_ok=True)
                note = (
                    "report removed because the tables changed; rebuild it with "
                    + REPORT_STEP.format(folder=path)
                )
            rec = _read_json(path_of(staging, "record"))
            rec["notes"] = [*rec.get("notes", []), note]
            _finish_record(staging, rec)
        if then is not None:
            then(staging)
            _finish_record(staging, _read_json(path_of(staging, "record")))

    atomic.swap_in(path, fill)
    return _read_json(path_of(path, "record"))


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


def clean_staging(parent: str | Path, name: str) -> list[Path]:
    """Remove staging folders a killed run left beside ``parent/name`` (older than a minute)."""
    parent = Path(parent)
    removed = []
    if not parent.is_dir():
        return removed
    now = time.time()
    for p in parent.glob(f".{name}.*"):
        if p.suffix in (".part", ".old") and p.is_dir():
            try:
                if now - p.stat().st_mtime > 60:
                    shutil.rmtree(p, ignore_errors=True)
                    removed.append(p)
            except OSError:
                continue
    return removed


def new_record(**parts) -> dict:
    """The top of run.json: schema, tool, then the given parts in order."""
    return {"workbench_run": SCHEMA_VERSION, "tool": TOOL, **parts}


def write_comparison_files(folder: Path, table: pd.DataFrame, pointwise: pd.DataFrame,
                           doc: dict) -> list[Path]:
    """comparison.csv, comparison_pointwise.csv and comparison.json into ``folder``."""
    paths = [path_of(folder, n) for n in ("comparison_table", "comparison_pointwise",
                                          "comparison")]
    atomic.write_csv(paths[0], table)
    atomic.write_csv(paths[1], pointwise)
    atomic.write_json(paths[2], doc)
    return paths


def read_comparison(run_folder: Path) -> tuple[dict, pd.DataFrame | None] | None:
    """The comparison a run folder belongs to: in the folder, or in the folder around it
    when the run is one of several fitted and compared together (``compare --data``)."""
    for where in (run_folder, run_folder.parent):
        doc_path = path_of(where, "comparison")
        if not doc_path.exists():
            continue
        doc = _read_json(doc_path)
        runs = [str(m.get("run")) for m in doc.get("models", [])]
        if where != run_folder and run_folder.name not in runs:
            continue
        doc = {**doc, "_here": run_folder.name if where != run_folder else None}
        table_path = path_of(where, "comparison_table")
        return doc, (read_table(table_path) if table_path.exists() else None)
    return None


__all__ = [
    "COMPARISON_FILES",
    "FILES",
    "FolderContents",
    "FolderParts",
    "SCHEMA_VERSION",
    "TEXT_COLUMNS",
    "check_replaceable",
    "clean_staging",
    "is_run_folder",
    "path_of",
    "read_folder",
    "read_posterior",
    "read_table",
    "update_folder",
    "write_folder",
]
