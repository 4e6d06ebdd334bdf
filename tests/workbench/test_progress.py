"""The progress display: on a terminal only, silent with --quiet, in a pipe and from Python."""

from __future__ import annotations

import io

import pytest

from workbench import progress
from workbench.cli.main import build_parser


class _Terminal(io.StringIO):
    def isatty(self) -> bool:
        return True


def test_steps_show_on_a_terminal_with_their_time():
    screen = _Terminal()
    with progress.showing(progress.Display(screen)):
        with progress.step("reading data"):
            pass
        with pytest.raises(KeyError), progress.step("fitting"):
            raise KeyError("x")
    lines = screen.getvalue().split("\n")
    assert lines[0].startswith("\rreading data ...\rreading data ... ")
    assert lines[0].endswith(" s")
    assert lines[1] == "\rfitting ...\rfitting ... stopped"


@pytest.mark.parametrize("stream, enabled", [(io.StringIO(), True), (_Terminal(), False)])
def test_silent_in_a_pipe_or_when_quiet(stream, enabled):
    with progress.showing(progress.Display(stream, enabled=enabled)):
        with progress.step("writing"):
            pass
    assert stream.getvalue() == ""


def test_silent_from_python_without_a_display():
    with progress.step("reading data"):  # nothing set: no output, no error
        pass


def test_quiet_is_a_command_line_flag_only():
    from workbench.options import FIT_OPTIONS

    args = build_parser().parse_args(["fit", "data.csv", "--quiet"])
    assert args.quiet is True
    assert "quiet" not in FIT_OPTIONS  # not a setting of the run: run.json never records it
