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

import hashlib
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
from .atomic import _copy_linked, clean_staging, glob_escape  # noqa: F401  (re-export)

#: the label of the new, unseen group's row in per-group tables (predictions): a reserved name
NEW_GROUP_LABEL = "(new group)"
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
    "effects": "effects.csv",
    "adjusted_rates": "adjusted_rates.csv",
    "oe_funnel_curve": "oe_funnel_curve.csv",
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
    "sensitivity": "sensitivity.csv",
    "sensitivity_summary": "sensitivity.json",
    "calibration": "calibration.csv",
    "calibration_replicates": "calibration_replicates.csv",
    "calibration_summary": "calibration.json",
    # finished replicates of an unfinished calibration, one JSON line each; kept BESIDE the
    # folder as .<folder name><this> (a folder holds only files its run.json lists) until the
    # calibration lands
    "calibration_staging": ".calibration-replicates.jsonl",
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
    "oe_outside_95",
    "oe_outside_998",
    "term",
    "note",
    "level",
    "reference",
    "kind",
    "model",
    "run",
    "engine",
    "preference",
    "loo_method",
    "quantity",
    "statistic",
    "verdict",
    "alternative",
    "baseline_flag",
    "alternative_flag",
    "baseline_rank_interval",
    "alternative_rank_interval",
)


def path_of(folder: str | Path, name: str) -> Path:
    """The path of one of :data:`FILES` (or :data:`COMPARISON_FILES`) in ``folder``."""
    return Path(folder) / (FILES.get(name) or COMPARISON_FILES[name])


def read_table(path: str | Path) -> pd.DataFrame:
    """A run-folder CSV: names kept as text, blanks as missing, nothing else changed.

    Undoes the spreadsheet guard of :func:`workbench.io.atomic.write_csv` (one ``'`` before a
    text that would start a formula), so names read back exactly as they were written.
    """
    path = Path(path)
    header = pd.read_csv(path, nrows=0).columns
    dtype = {c: str for c in header if atomic.restore(c) in TEXT_COLUMNS}
    table = pd.read_csv(path, dtype=dtype, keep_default_na=False, na_values=[""])
    table.columns = [atomic.restore(c) for c in table.columns]
    for c in table.columns:
        if table[c].dtype.kind == "O":
            values = table[c].to_numpy(dtype=object)
            if any(isinstance(v, str) and v[:1] == atomic.FORMULA_GUARD for v in values):
                table[c] = [atomic.restore(v) for v in values]
    return table


def _rebuild(record: dict | None) -> str:
    """How to make the folder again: the command that made it, when run.json says it."""
    command = (record or {}).get("command")
    if isinstance(command, str) and command.strip():
        return f"rebuild it with: {command}"
    return "rebuild it with 'workbench fit' on the same data and settings"


def _damaged(path: Path, what: str, record: dict | None = None) -> DataError:
    return DataError(f"run folder {str(path.parent)!r} is damaged: {path.name} {what};"
                     f" {_rebuild(record)}.")


def _read_json(path: Path, record: dict | None = None) -> dict:
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise _damaged(path, f"cannot be read ({type(exc).__name__}: {str(exc)[:80]})",
                       record) from exc
    if not isinstance(doc, dict):
        raise _damaged(path, "is not a JSON object", record)
    return doc


#: file digests already computed, by (path, inode, size, mtime): hard links share them
_DIGESTS: dict[tuple, str] = {}


def _digest(path: Path) -> str:
    st = path.stat()
    key = (str(path.resolve()), st.st_ino, st.st_size, st.st_mtime_ns)
    if key not in _DIGESTS:
        h = hashlib.sha256()
        with open(path, "rb") as f:
            while block := f.read(1 << 22):
                h.update(block)
        _DIGESTS[key] = h.hexdigest()
    return _DIGESTS[key]


def _digests(folder: Path) -> dict[str, str]:
    """sha256 of every file the folder holds but run.json, by path inside the folder."""
    out = {}
    for item in sorted(folder.iterdir()):
        if item.name == FILES["record"] or item.name.startswith("."):
            continue
        if item.is_dir():
            for sub in sorted(item.iterdir()):
                if sub.is_file() and not sub.name.startswith("."):
                    out[f"{item.name}/{sub.name}"] = _digest(sub)
        elif item.is_file():
            out[item.name] = _digest(item)
    return out


def marker_problem(record: dict) -> str | None:
    """Why a run.json is not the marker of a folder this code wrote, or None."""
    if record.get("tool") != TOOL:
        return "it does not name workbench as the tool that wrote it"
    schema = record.get("workbench_run")
    if not isinstance(schema, int) or isinstance(schema, bool) or schema != SCHEMA_VERSION:
        return f"its schema {schema!r} is not {SCHEMA_VERSION}, the one this version writes"
    return None


def verify_digests(folder: Path, record: dict) -> None:
    """DataError naming the first file that differs from what was written (or is missing)."""
    said = record.get("digests")
    if not isinstance(said, dict):
        return  # written before digests were kept: the other checks still apply
    actual = _digests(folder)
    for name, digest in said.items():
        if name not in actual:
            raise _damaged(folder / name, "is missing", record)
        if actual[name] != digest:
            raise _damaged(folder / name, "was changed or damaged after it was written (its"
                           " sha256 differs from run.json's)", record)
    extra = sorted(set(actual) - set(said))
    if extra:
        raise DataError(
            f"run folder {str(folder)!r} holds {extra[0]!r}, which workbench did not write;"
            " move it out of the folder (nothing of it is read)."
        )


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
    """True when ``path`` holds a run.json this code wrote (tool and schema checked)."""
    record = Path(path) / FILES["record"]
    if not record.is_file():
        return False
    try:
        doc = json.loads(record.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError):
        return False
    return isinstance(doc, dict) and marker_problem(doc) is None


def read_folder(path: str | Path, *, tables: tuple[str, ...] | None = None) -> FolderContents:
    """Read a run folder's record, documents and tables (all, or the named ones).

    Checks first that run.json is this tool's (tool, schema), that every file is the one
    written (sha256 digests in run.json), that every JSON and CSV parses, and that
    estimates.csv has one row per group run.json records.

    Raises
    ------
    DataError
        The folder is not a run folder, or a file in it is damaged (named, with the fix).
    """
    path = Path(path)
    record_path = path_of(path, "record")
    if not path.is_dir() or not record_path.exists():
        raise DataError(
            f"{str(path)!r} is not a run folder (no {FILES['record']});"
            " give a folder written by 'workbench fit' or 'workbench demo'."
        )
    record = _read_json(record_path)
    problem = marker_problem(record)
    if problem is not None:
        raise DataError(
            f"{str(record_path)!r} is not the record of a workbench run folder: {problem};"
            f" {_rebuild(record)}."
        )
    verify_digests(path, record)
    if not path_of(path, "estimates").exists():
        raise _damaged(path_of(path, "estimates"), "is missing", record)
    contents = FolderContents(path, record)
    for name in DOCUMENTS:
        p = path_of(path, name)
        if p.exists():
            contents.documents[name] = _read_json(p, record)
    for name in tables or TABLES:
        p = path_of(path, name)
        if p.exists():
            try:
                contents.tables[name] = read_table(p)
            except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError,
                    ValueError) as exc:
                raise _damaged(p, f"cannot be read ({type(exc).__name__})", record) from exc
    groups = (record.get("input") or {}).get("groups")
    estimates = contents.tables.get("estimates")
    if estimates is None and tables is not None:  # the row count is checked whatever is read
        try:
            estimates = read_table(path_of(path, "estimates"))
        except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError,
                ValueError) as exc:
            raise _damaged(path_of(path, "estimates"), f"cannot be read ({type(exc).__name__})",
                           record) from exc
    if groups is not None and len(estimates) != groups:
        raise _damaged(path_of(path, "estimates"), f"has {len(estimates)} rows but run.json"
                       f" records {groups} groups", record)
    missing = [c for c in ("group", "successes", "trials") if c not in estimates.columns]
    if missing:
        raise _damaged(path_of(path, "estimates"), f"has no column {missing[0]!r}", record)
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
            raise _damaged(nc, f"cannot be read ({type(exc).__name__})") from exc
    return idata


# -- writing ----------------------------------------------------------------------------------------


def _listed(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.iterdir() if not p.name.startswith("."))


def _writable(folder: Path) -> bool:
    return os.access(folder, os.W_OK | os.X_OK)


def check_replaceable(out: str | Path, *, kind: str = "run", marker: str | None = None,
                      label: str = "--out", allow_cwd: bool = False) -> None:
    """DataError unless ``out`` may be replaced: absent, empty, or a folder this tool wrote.

    A run folder is recognised by its run.json (tool and schema checked) and may hold only
    the files it lists (hidden ones included, and only images in figures/); a comparison
    folder by ``marker`` (comparison.json) beside run folders. Symbolic links, the working
    folder, read-only folders and unwritable parents are refused: all of this is known
    before any fitting, so callers check it first.
    """
    out = Path(out)
    if out.is_symlink():
        if not out.exists():
            raise DataError(f"{label} {str(out)!r} is a dangling symbolic link; give a real folder.")
        raise DataError(
            f"{label} {str(out)!r} is a symbolic link; give the folder it points to, or a new one."
        )
    parent = Path(os.path.abspath(out)).parent
    if not out.exists():
        existing = parent
        while not existing.exists():
            existing = existing.parent
        if not existing.is_dir() or not _writable(existing):
            raise DataError(
                f"{label} {str(out)!r}: cannot write in {str(existing)!r}; choose another folder."
            )
        return
    if not out.is_dir():
        raise DataError(f"{label} {str(out)!r} is a file; give a folder for the {kind}.")
    here = Path.cwd().resolve()
    if not allow_cwd and (out.resolve() == here or out.resolve() in here.parents):
        raise DataError(
            f"{label} {str(out)!r} is the working folder or holds it; give a folder of its own."
        )
    if not _writable(parent):
        raise DataError(
            f"{label} {str(out)!r}: cannot replace it, {str(parent)!r} is not writable; choose"
            " another folder."
        )
    present = sorted(p.name for p in out.iterdir())
    if not present:
        return
    if not _writable(out):
        raise DataError(
            f"{label} {str(out)!r} is read-only; make it writable or choose a new folder."
        )
    if marker is not None:
        if (out / marker).exists():
            return
        raise DataError(
            f"{label} {str(out)!r} exists and is not a {kind} folder; choose a new folder."
        )
    record_path = out / FILES["record"]
    if not record_path.is_file():
        raise DataError(
            f"{label} {str(out)!r} exists and is not a run folder written by workbench (no"
            f" {FILES['record']}); choose a new folder."
        )
    try:
        record = json.loads(record_path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError):
        record = None
    problem = "it cannot be read" if not isinstance(record, dict) else marker_problem(record)
    if problem is not None:
        raise DataError(
            f"{label} {str(out)!r} holds a {FILES['record']} that is not workbench's ({problem});"
            " it is left untouched: choose a new folder."
        )
    listed = set(record.get("files") or []) | {FILES["record"]}
    foreign = [n for n in present if n not in listed]
    figures = out / FILES["figures"]
    if figures.is_dir() and not figures.is_symlink():
        foreign += [f"{FILES['figures']}/{p.name}" for p in sorted(figures.iterdir())
                    if not (p.is_file() and p.suffix == ".png" and not p.name.startswith("."))]
    links = [n for n in present if (out / n).is_symlink()]
    foreign += [n for n in links if n not in foreign]
    if foreign:
        raise DataError(
            f"{label} {str(out)!r} holds files workbench did not write ({', '.join(foreign[:5])});"
            " move them away or choose a new folder."
        )


def replace_folder(out: str | Path, fill: Callable[[Path], None], *, kind: str = "run",
                   marker: str | None = None) -> Path:
    """Fill a fresh sibling staging folder, then swap it in for ``out``; the old one goes."""
    out = Path(out)
    check_replaceable(out, kind=kind, marker=marker)
    clean_staging(Path(os.path.abspath(out)).parent, out.name)
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
    record["digests"] = _digests(folder)
    atomic.write_json(path_of(folder, "record"), record)
    return record


def refresh_record(folder: str | Path) -> dict:
    """Bring run.json's file list and digests up to date with the files in ``folder``.

    For a step that writes derived files (the report) straight into a folder it owns, such as
    a staging folder; every other write goes through :func:`write_folder`/:func:`update_folder`.
    """
    folder = Path(folder)
    return _finish_record(folder, _read_json(path_of(folder, "record")))


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
    check_replaceable(path, label="run folder", allow_cwd=True)
    clean_staging(Path(os.path.abspath(path)).parent, path.name)
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
