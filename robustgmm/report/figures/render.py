"""Draw every figure of an audit into files (PNG, SVG, PDF), byte-identical on a rebuild."""
from __future__ import annotations

import io
import re
from xml.sax.saxutils import escape
from dataclasses import dataclass, field
from pathlib import Path

import matplotlib
from matplotlib.figure import Figure

from ...atomic import atomic_write_bytes
from ..labels import slug
from .ar_band import persistence_frame, plot_ar_band, plot_ar_sum
from .diagnostics import plot_diagnostics_matrix
from .hansen_drift import plot_hansen_drift
from .spec_curve import plot_specification_curve
from ..inputs import AuditFolder
from .common import choice_rows

_MARK = re.compile(r"<(use|path)\b[^>]*?/>")


def add_svg_tooltips(svg: str, tooltips: dict[str, list[str]]) -> str:
    """Give the i-th mark of each tooltip group (``attach_tooltips``) an SVG
    ``<title>`` with its text: browsers show it on hover, so a variant id cited by a
    rule can be found among hundreds of marks. A group whose mark count differs from
    its texts is left without tooltips rather than labelled wrongly."""
    for gid, texts in tooltips.items():
        start = svg.find(f'<g id="{gid}">')
        if start < 0:
            continue
        # the group ends at the first "</g>" that closes it: nested groups are the
        # clip-path group only
        body_start = start + len(f'<g id="{gid}">')
        depth, pos = 1, body_start
        for m in re.finditer(r"<g\b|</g>", svg[body_start:]):
            depth += 1 if m.group() == "<g" else -1
            if depth == 0:
                pos = body_start + m.start()
                break
        body = svg[body_start:pos]
        defs_end = body.find("</defs>")
        head, marks = (body[:defs_end], body[defs_end:]) if defs_end >= 0 else ("", body)
        found = list(_MARK.finditer(marks))
        if len(found) != len(texts):
            continue
        it = iter(texts)
        marks = _MARK.sub(lambda m: m.group()[:-2] + f"><title>{escape(next(it))}</title></"
                          f"{m.group(1)}>", marks)
        svg = svg[:body_start] + head + marks + svg[pos:]
    return svg


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


#: Resolution of the PNG figures (dots per inch).
PNG_DPI = 150


def _tight_box(fig: Figure):
    """The figure's tight bounding box (inches, with the usual padding), measured
    once at the PNG's resolution and used for every format: a tight box per format
    would draw the figure twice per format (the PNG is pixel for pixel the one of a
    tight box of its own; the vector formats' text extents agree to a fraction of a
    point)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    dpi = fig.get_dpi()
    fig.set_dpi(PNG_DPI)
    try:
        box = fig.get_tightbbox(FigureCanvasAgg(fig).get_renderer())
    finally:
        fig.set_dpi(dpi)
    return box.padded(matplotlib.rcParams["savefig.pad_inches"])


def _save(fig: Figure, out_dir: Path, name: str, formats) -> tuple[bytes, list[Path]]:
    paths, png = [], b""
    # Metadata without dates or versions so that a rebuild is byte-identical.
    metadata = {"png": {"Software": None}, "svg": {"Date": None},
                "pdf": {"CreationDate": None, "ModDate": None, "Producer": None}}
    box = _tight_box(fig)
    for fmt in formats:
        buf = io.BytesIO()
        fig.savefig(buf, format=fmt, dpi=PNG_DPI if fmt == "png" else None,
                    bbox_inches=box, metadata=metadata[fmt])
        data = buf.getvalue()
        if fmt == "svg":
            data = add_svg_tooltips(data.decode("utf-8"),
                                    fig.__dict__.get("robustgmm_tooltips", {})).encode("utf-8")
        if fmt == "png":
            png = data
        paths.append(atomic_write_bytes(out_dir / f"{name}.{fmt}", data))
    return png, paths


def draw_figures(audit: AuditFolder) -> list[tuple[str, str, str, str | None, Figure]]:
    """Every figure of the report as ``(base name, title, kind, term, Figure)``, in
    report order, drawn at the size the report uses (not yet saved)."""
    out = []
    rows = max((len(choice_rows(audit, audit.term_estimates(t))) for t in audit.focus),
               default=0)
    for term in audit.focus:
        fig = Figure(figsize=(9.0, 3.6 + 0.2 * rows))
        plot_specification_curve(fig, audit, term)
        out.append((f"spec_curve_{slug(term)}", f"Specification curve: {term}", "spec_curve",
                    term, fig))
    fig = Figure(figsize=(8.0, 4.0))
    plot_hansen_drift(fig.add_subplot(), audit)
    out.append(("hansen_drift", "Hansen p-value against instrument count", "hansen_drift",
                None, fig))
    for term in audit.ar_terms:
        fig = Figure(figsize=(9.0, 4.0))
        plot_ar_band(fig.add_subplot(), audit, term)
        out.append((f"ar_band_{slug(term)}",
                    f"Autoregressive coefficient {term} against the within-OLS band",
                    "ar_band", term, fig))
    if len(audit.ar_terms) > 1 and not persistence_frame(audit).empty:
        fig = Figure(figsize=(9.0, 4.0))
        plot_ar_sum(fig.add_subplot(), audit)
        out.append(("ar_sum", "Sum of the autoregressive coefficients against its within-OLS "
                    "band", "ar_sum", None, fig))
    fig = Figure(figsize=(9.0, 3.0))
    plot_diagnostics_matrix(fig.add_subplot(), audit)
    out.append(("diagnostics", "Diagnostics by variant", "diagnostics", None, fig))
    return out


def render_figures(audit: AuditFolder, out_dir, *, formats=("png", "svg", "pdf")) -> list[FigureFile]:
    """Draw every figure into ``out_dir`` (normally ``AUDIT/figures``) in each format."""
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    made: list[FigureFile] = []
    # rc_context only pins the SVG id salt and font handling for reproducible files.
    with matplotlib.rc_context({"svg.hashsalt": "robustgmm", "svg.fonttype": "path",
                                "pdf.fonttype": 42}):
        used = set()
        for name, title, kind, term, fig in draw_figures(audit):
            base, k = name, 2
            while name in used:
                name, k = f"{base}_{k}", k + 1
            used.add(name)
            png, paths = _save(fig, out_dir, name, formats)
            made.append(FigureFile(name, title, kind, term, png, tuple(paths)))
    return made
