"""The command line: argument parsing and every terminal sentence."""

from .main import build_parser, main

__all__ = ["build_parser", "main"]
