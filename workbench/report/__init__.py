"""The report: a run folder's tables as one self-contained HTML page, figures as PNG files.

:func:`render_into` writes both into a (staging) run folder; see :mod:`.render`.
"""

from __future__ import annotations

from .render import CAUTIONS, Report, render_into

__all__ = ["CAUTIONS", "Report", "render_into"]
