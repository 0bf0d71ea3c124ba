"""The audit report: figures, report.html, report.md, table.tex, referee.txt.

Everything is rebuilt from the files of an audit output folder (variants.csv,
estimates.csv, bounds.csv, verdict.json, manifest.json; optional truth.json), never
by re-estimating, so ``robustgmm report DIR`` can restyle an old audit::

    from robustgmm.report import build_report
    paths = build_report("audit_out")   # -> [Path(...)/"report.html", ...]

Modules: :mod:`.inputs` reads and checks the folder, :mod:`.summary` computes the
shared numbers, :mod:`.figures` draws, :mod:`.html`, :mod:`.markdown`,
:mod:`.latex` and :mod:`.referee` write the documents.
"""
from __future__ import annotations

from pathlib import Path

from ..atomic import atomic_write_text
from .context import build_context
from .figures import render_figures
from .html import render_html
from ..errors import InputError
from .inputs import AuditFolder, read_audit_folder
from .latex import render_latex
from .markdown import render_markdown
from .referee import referee_paragraph, referee_text
from .summary import summarize
from .wordtable import render_word_table

__all__ = ["build_report", "read_audit_folder", "AuditFolder", "InputError",
           "referee_paragraph", "summarize"]


def build_report(out_dir, *, formats=("png", "svg", "pdf")) -> list[Path]:
    """Write every report document into ``out_dir`` from the audit files there.

    Returns the paths written: figures (``figures/*.png|svg|pdf``), ``report.html``,
    ``report.md``, ``table.tex``, ``table.html`` (the same table for Word and
    LibreOffice), ``referee.txt``. Raises
    :class:`~robustgmm.errors.InputError` naming each missing file or column when
    ``out_dir`` is not an audit output folder. Every file is written atomically."""
    out = Path(out_dir)
    audit = read_audit_folder(out)
    summary = summarize(audit)
    figures = render_figures(audit, out / "figures", formats=formats)
    context = build_context(audit, figures, summary)
    written = [p for f in figures for p in f.paths]
    sim_section, sim_md, sim_referee = _simulation_section(audit, out, formats, written)
    context["simulation"] = sim_section
    drop_section, drop_md = _dropping_section(audit, out, formats, written)
    context["dropping"] = drop_section
    context["dropping_md"] = drop_md
    context["simulation_md"] = sim_md
    written.append(atomic_write_text(out / "report.html", render_html(context)))
    written.append(atomic_write_text(out / "report.md", render_markdown(context)))
    written.append(atomic_write_text(out / "table.tex", render_latex(audit, summary)))
    written.append(atomic_write_text(out / "table.html", render_word_table(audit, summary)))
    written.append(atomic_write_text(out / "referee.txt",
                                     referee_text(audit, summary) + sim_referee))
    return written


def _dropping_section(audit, out: Path, formats, written: list):
    """The section "Does a handful of units drive the result?" (:mod:`.dropping`): its
    context and its Markdown (its referee sentences are part of the referee paragraphs,
    :mod:`.referee`); empty when the folder holds no dropping-units files
    (``[audit] influence = "none"``)."""
    from . import dropping as drop_mod
    if not audit.dropping:
        return None, ""
    figs = drop_mod.render_dropping_figures(audit, out / "figures", formats=formats)
    written.extend(p for f in figs for p in f.paths)
    ctx = drop_mod.section_context(audit, figs)
    return ctx, drop_mod.markdown_section(ctx)


def _simulation_section(audit, out: Path, formats, written: list):
    """The optional section "How these estimators behave at this sample size"
    (:mod:`.simulation`): its context, its Markdown and its referee sentences; empty
    when the folder holds no simulation.csv."""
    from . import simulation as sim_mod
    settings = list(audit.manifest.get("vary") or [])
    sim = sim_mod.read_simulation(out, settings, getattr(audit, "thresholds", None))
    if sim is None:
        return None, "", ""
    figs = sim_mod.render_simulation_figures(sim, out / "figures", audit.focus, formats=formats)
    written.extend(p for f in figs for p in f.paths)
    try:
        units = int(audit.base_row()["units"])
    except (KeyError, TypeError, ValueError, IndexError):
        units = None
    ctx = sim_mod.section_context(sim, figs, audit.focus, units)
    import textwrap
    text = sim_mod.referee_sentences(sim, audit.focus, units)
    referee = ("\n\n" + textwrap.fill(text, width=88, break_long_words=False,
                                      break_on_hyphens=False)) if text else ""
    return ctx, sim_mod.markdown_section(ctx), referee
