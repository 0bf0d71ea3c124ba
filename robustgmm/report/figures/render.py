"""Draw every figure of an audit into files (PNG, SVG, PDF), byte-identical on a rebuild."""
from __future__ import annotations

import io
from dataclasses import dataclass, field
from pathlib import Path

import matplotlib
from matplotlib.figure import Figure

from ...atomic import atomic_write_bytes
from ..labels import slug
from .ar_band import plot_ar_band
from .diagnostics import plot_diagnostics_matrix
from .hansen_drift import plot_hansen_drift
from .spec_curve import plot_specification_curve
from ..inputs import AuditFolder
from .common import (BLACK, BLUE, GREEN, GREY, GROUP_COLOURS, GROUP_MARKERS, LIGHT,
                     MAX_TICK_LABELS, ORANGE, PURPLE, SKY, VERMILLION, YELLOW,
                     choice_rows, critical, mark_base_and_truth, no_data, same, sizes,
                     sorted_term, style, variant_ticks)


@dataclass(frozen=True)
class FigureFile:
    """One rendered figure: its base name, title, the PNG bytes (for inlining) and
    the paths written."""

    name: str
    title: str
    kind: str
    term: str | None
    png: bytes
    paths: tuple[Path, ...] = field(default_factory=tuple)


def _save(fig: Figure, out_dir: Path, name: str, formats) -> tuple[bytes, list[Path]]:
    paths, png = [], b""
    # Metadata without dates or versions so that a rebuild is byte-identical.
    metadata = {"png": {"Software": None}, "svg": {"Date": None},
                "pdf": {"CreationDate": None, "ModDate": None, "Producer": None}}
    for fmt in formats:
        buf = io.BytesIO()
        fig.savefig(buf, format=fmt, dpi=150 if fmt == "png" else None,
                    bbox_inches="tight", metadata=metadata[fmt])
        data = buf.getvalue()
        if fmt == "png":
            png = data
        paths.append(atomic_write_bytes(out_dir / f"{name}.{fmt}", data))
    return png, paths


def render_figures(audit: AuditFolder, out_dir, *, formats=("png", "svg", "pdf")) -> list[FigureFile]:
    """Draw every figure into ``out_dir`` (normally ``AUDIT/figures``) in each format."""
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    made: list[FigureFile] = []
    # rc_context only pins the SVG id salt and font handling for reproducible files.
    with matplotlib.rc_context({"svg.hashsalt": "robustgmm", "svg.fonttype": "path",
                                "pdf.fonttype": 42}):
        used = set()

        def unique(name):
            base, k = name, 2
            while name in used:
                name, k = f"{base}_{k}", k + 1
            used.add(name)
            return name

        def emit(fig, name, title, kind, term=None):
            png, paths = _save(fig, out_dir, name, formats)
            made.append(FigureFile(name, title, kind, term, png, tuple(paths)))

        rows = max((len(choice_rows(audit, audit.term_estimates(t))) for t in audit.focus),
                   default=0)
        for term in audit.focus:
            fig = Figure(figsize=(9.0, 3.4 + 0.2 * rows))
            plot_specification_curve(fig, audit, term)
            emit(fig, unique(f"spec_curve_{slug(term)}"), f"Specification curve: {term}",
                 "spec_curve", term)
        fig = Figure(figsize=(8.0, 4.0))
        plot_hansen_drift(fig.add_subplot(), audit)
        emit(fig, unique("hansen_drift"), "Hansen p-value against instrument count",
             "hansen_drift")
        for term in audit.ar_terms:
            fig = Figure(figsize=(9.0, 4.0))
            plot_ar_band(fig.add_subplot(), audit, term)
            emit(fig, unique(f"ar_band_{slug(term)}"),
                 f"Autoregressive coefficient {term} against the within-OLS band", "ar_band", term)
        fig = Figure(figsize=(9.0, 3.0))
        plot_diagnostics_matrix(fig.add_subplot(), audit)
        emit(fig, unique("diagnostics"), "Diagnostics by variant", "diagnostics")
    return made

