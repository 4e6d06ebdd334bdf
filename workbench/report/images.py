"""The report's figures: which ones a run folder can show, drawn and kept as PNG bytes."""

from __future__ import annotations

import base64
import io
import struct
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from pathlib import Path

from .. import figures
from ..io import atomic
from ..io.runfolder import FolderContents
from .sections import STATISTIC_NAMES

#: pixels per inch of the PNG files (sharp on slides) and of the figures on the page
FIGURE_DPI = 140
PAGE_DPI = 110


@dataclass
class Image:
    """One rendered figure: PNG bytes and what the page needs to show it."""

    name: str
    png: bytes
    alt: str
    width: int = 0
    height: int = 0

    def __post_init__(self) -> None:
        # PNG header: width and height are the two big-endian ints after the IHDR tag;
        # shown at the figures' own scale (FIGURE_DPI px per inch), sharp on dense screens
        w, h = struct.unpack(">II", self.png[16:24])
        self.width, self.height = round(w * PAGE_DPI / FIGURE_DPI), round(h * PAGE_DPI / FIGURE_DPI)

    @property
    def uri(self) -> str:
        return "data:image/png;base64," + base64.b64encode(self.png).decode("ascii")

    @property
    def file_name(self) -> str:
        return f"{self.name}.png"


def _png(fig) -> bytes:
    """The figure as a 256-colour PNG: about a third of the size, palette colours kept exact
    to within one unit (octree quantisation, no dithering)."""
    from PIL import Image as PILImage

    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=FIGURE_DPI, metadata={"Software": None}, facecolor="white")
    buf.seek(0)
    with PILImage.open(buf) as full:
        small = full.convert("RGB").quantize(
            colors=256, method=PILImage.Quantize.FASTOCTREE, dither=PILImage.Dither.NONE
        )
    out = io.BytesIO()
    small.save(out, format="PNG")
    return out.getvalue()


def independent_draws(folder: FolderContents) -> bool:
    """True when the posterior draws are independent (an exact engine): no mixing to show."""
    run = folder.diagnostics.get("run", {})
    if "independent_draws" in run:
        return bool(run["independent_draws"])
    return folder.record.get("engine") == "exact"


def has_population_draws(folder: FolderContents) -> bool:
    draws = folder.tables.get("population_draws")
    return draws is not None and len(draws) > 0 and bool(figures.parameter_names(draws))


Maker = tuple[Callable[[], object], str]


def figure_makers(folder: FolderContents) -> dict[str, Maker]:
    """The figures this folder can show: name -> (make figure, alt text)."""
    t = folder.tables
    settings = folder.settings
    n = len(folder.estimates)
    makers: dict[str, Maker] = {
        "intervals": (
            lambda: figures.plot_intervals(
                folder.estimates, target=settings.get("target"), level=settings.get("level")
            ),
            f"Estimates and intervals of {n} groups, ordered from the highest estimate.",
        ),
        "shrinkage": (
            lambda: figures.plot_shrinkage(folder.estimates, t.get("population")),
            f"Observed rate against estimate for {n} groups, marker area by trials.",
        ),
    }
    parents = t.get("parents")
    if parents is not None and len(parents):
        makers["parents"] = (
            lambda: figures.plot_parents(parents, level=settings.get("level")),
            f"Effects of {len(parents)} parents on the log-odds with their intervals.",
        )
    makers.update(_ranking_makers(folder))
    makers.update(_check_makers(folder))
    if "adjusted_rates" in t:
        from ..figures.casemix import plot_oe_funnel

        makers["oe_funnel"] = (
            lambda: plot_oe_funnel(t["adjusted_rates"], t.get("oe_funnel_curve")),
            "Funnel plot: observed/expected against expected successes, limits 95% and 99.8%.",
        )
    if "calibration" in t and "calibration_replicates" in t:
        from ..figures.audit import plot_calibration

        makers["calibration"] = (
            lambda: plot_calibration(t["calibration"], t["calibration_replicates"]),
            "Simulation-based calibration: rank histograms and interval coverage.",
        )
    if has_population_draws(folder):
        draws = t["population_draws"]
        makers["population"] = (
            lambda: figures.plot_population(draws, t.get("population")),
            "Posterior histograms of the population parameters.",
        )
        if not independent_draws(folder):
            makers["mixing"] = (
                lambda: figures.plot_mixing(draws),
                "Trace and rank histogram per chain of each population parameter.",
            )
    return makers


def _ranking_makers(folder: FolderContents) -> dict[str, Maker]:
    t = folder.tables
    ranking = folder.record.get("ranking") or {}
    makers: dict[str, Maker] = {}
    if "ranks" in t and t["ranks"]["rank_median"].notna().any():
        makers["ranks"] = (
            lambda: figures.plot_ranks(t["ranks"], k=ranking.get("top_k")),
            "Rank medians and intervals, best placed first.",
        )
    if "funnel" in t:
        source = ranking.get("funnel_benchmark_source") or "benchmark"
        makers["funnel"] = (
            lambda: figures.plot_funnel(t["funnel"], t.get("funnel_curve"), benchmark_name=source),
            "Funnel plot: observed rate against trials with 95% and 99.8% control limits.",
        )
    return makers


def _check_makers(folder: FolderContents) -> dict[str, Maker]:
    t = folder.tables
    makers: dict[str, Maker] = {}
    checks = folder.documents.get("checks")
    if checks and "ppc_statistics" in t:
        rows = [r for r in checks.get("statistics", []) if r.get("verdict") != "not computed"]
        makers["predictive"] = (
            lambda: figures.plot_predictive(rows, t["ppc_statistics"], names=STATISTIC_NAMES),
            "Posterior predictive checks: replicated test statistics against the observed ones.",
        )
    groups = t.get("group_checks")
    if groups is not None and "loo_pit" in groups and groups["loo_pit"].notna().any():
        makers["loo_pit"] = (
            lambda: figures.plot_loo_pit(groups),
            "Histogram of LOO-PIT values.",
        )
    return makers


def render_figures(folder: FolderContents) -> dict[str, Image]:
    """Draw every figure the folder can show and keep it as PNG bytes."""
    images = {}
    for name, (make, alt) in figure_makers(folder).items():
        images[name] = Image(name, _png(figures.figure_of(make())), alt)
    return images


def write_figures(out: Path, images: Mapping[str, Image]) -> list[Path]:
    """Each image as a PNG file in ``out``, atomically; PNG files no longer drawn go."""
    written = []
    for image in images.values():
        target = out / image.file_name
        atomic.write_atomic(target, lambda p, data=image.png: p.write_bytes(data))
        written.append(target)
    if out.exists():
        keep = {image.file_name for image in images.values()}
        for stale in out.glob("*.png"):
            if stale.name not in keep:
                stale.unlink()
    return written


__all__ = ["Image", "figure_makers", "independent_draws", "render_figures", "write_figures"]
