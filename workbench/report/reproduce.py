"""Section 9 of the report: the commands that made the run folder, and how to repeat the fit.

The commands come from the run record: its ``command`` (the fit, None when it was run from
Python) and its ``steps`` (each later step that changed the folder: rank, predict, check,
report), in order. The reproduce line of the fit is spelled from the recorded ``settings``
through the option declarations (:data:`workbench.options.FIT_OPTIONS`): one flag per option
whose value differs from its declared default, the seed being the one used.
"""

from __future__ import annotations

import shlex
from pathlib import Path

from ..io.runfolder import FILES, REPORT_STEP
from ..models.exceptions import ParameterError
from ..options import FIT_OPTIONS, Option, Texts, flag_of
from ._format import pretty

#: the fit command as a user types it, before its data file and flags
FIT_COMMAND = ("workbench", "fit")


def commands(record: dict) -> list[dict]:
    """Every command that shaped the folder, in order: the fit, then each later step.

    Each entry: ``what`` (fit, rank, predict, check, report ...), ``command`` (the command
    line, or None when the step was run from Python) and ``at`` (when, if recorded).
    """
    made = [{"what": "fit", "command": record.get("command"), "at": record.get("created")}]
    for step in record.get("steps") or []:
        made.append(
            {"what": step.get("what", "?"), "command": step.get("command"), "at": step.get("at")}
        )
    return made


def _normalised(option: Option, value: object) -> object:
    """A recorded value as the declaration checks it (lists become tuples, text numbers
    numbers); a value the declaration refuses is kept as recorded."""
    try:
        return option.validate(value)
    except ParameterError:
        return value


def _word(value: object) -> str:
    if isinstance(value, float):
        return repr(value)  # round-trips exactly
    return str(value)


def option_words(option: Option, value: object) -> list[str]:
    """The command-line words that set ``option`` to ``value``."""
    if option.takes == "switch":
        return [option.flag] if value else [flag_of("no_" + option.name)]
    if option.takes in ("pair", "list"):
        return [option.flag, *(_word(v) for v in value)]
    inner = getattr(option.check, "inner", option.check)
    if isinstance(inner, Texts) and not isinstance(value, str):
        return [option.flag, ",".join(str(v) for v in value)]
    return [option.flag, _word(value)]


def changed_settings(record: dict) -> dict:
    """The recorded settings that differ from their declared defaults, the seed the one used."""
    settings = dict(record.get("settings") or {})
    if record.get("random_seed") is not None and "seed" in FIT_OPTIONS:
        settings["seed"] = record["random_seed"]
    changed = {}
    for name, option in FIT_OPTIONS.items():
        if name not in settings:
            continue
        value = _normalised(option, settings[name])
        if value != _normalised(option, option.default):
            changed[name] = value
    return changed


def command_line(record: dict) -> str | None:
    """A ``workbench fit`` command that repeats the run, from the run record's settings."""
    source = (record.get("input") or {}).get("source")
    if not record.get("settings") or not source:
        return None
    parts = [*FIT_COMMAND, str(source)]
    for name, value in changed_settings(record).items():
        parts += option_words(FIT_OPTIONS[name], value)
    return " ".join(shlex.quote(p) for p in parts)


def settings_rows(record: dict) -> list:
    """Every recorded setting, as (name, value) rows."""
    return [(k.replace("_", " "), pretty(v)) for k, v in (record.get("settings") or {}).items()]


def version_rows(record: dict) -> list:
    """Library versions, the input's fingerprint, when the run was made and whether final."""
    rows = [(name, str(v)) for name, v in (record.get("versions") or {}).items()]
    inp = record.get("input") or {}
    if inp.get("fingerprint"):
        rows.append(("input fingerprint (SHA-256)", inp["fingerprint"]))
    rows.append(("run created", pretty(record.get("created"))))
    rows.append(("final", "yes" if record.get("final") else "no"))
    return rows


def folder_files(record: dict, folder: Path) -> list[str]:
    """The files of the folder once the report is in it: listed, present, report, figures."""
    present = (p.name for p in folder.iterdir() if not p.name.startswith("."))
    return sorted({*record.get("files", []), *present, FILES["report"], FILES["figures"]})


def reproduce(record: dict, folder: Path, name: str) -> dict:
    """What section 9 shows; ``name`` is the folder's name once in place."""
    return {
        "commands": commands(record),
        "command": command_line(record),
        "report_step": REPORT_STEP.format(folder=shlex.quote(name)),
        "settings_rows": settings_rows(record),
        "version_rows": version_rows(record),
        "files": folder_files(record, folder),
    }


__all__ = ["changed_settings", "command_line", "commands", "option_words", "reproduce"]
