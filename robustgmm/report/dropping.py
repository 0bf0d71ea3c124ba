"""The report section "Does a handful of units drive the result?", from the
dropping-units files of an audit folder (influence.csv, influence_units.csv,
influence_path.csv, periods.csv; :mod:`robustgmm.audit.dropping`) and the
``few_units_flip`` entries of verdict.json.

It reads only files and words their numbers (the rule is evaluated once, in
:mod:`robustgmm.audit.verdicts.dropping`): per focus term the base model's three
searches (the set found, its exact refit), the most influential units, the range
of the leave-one-period-out estimates, a figure of the greedy path, and one
referee sentence ("dropping 4 of 400 bakeries (1.0%) makes the effect of staff hours
insignificant").
"""
from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pandas as pd
from matplotlib.figure import Figure

from ..audit.verdicts.dropping import flip_phrase, units_text
from ..options import DropTarget, LABELS
from .inputs import AuditFolder
from .labels import slug, term_text

READING = ("This answers which small set of units would overturn the conclusion, not "
           "which sample is right: a result that a handful of units drives may still be "
           "true of those units, and dropping units is itself a choice of sample that can "
           "create selection. The sets are found by a greedy search and refitted exactly; "
           "a smaller set may exist (the search is not exhaustive), so a reported set is an "
           "upper bound on the smallest one. Statistical robustness is not proof of "
           "instrument validity.")

#: Dropped unit ids shown in a table cell before "…".
SHOWN_IDS = 10
#: Influential units listed per term in the section.
SHOWN_UNITS = 5


def unit_noun(audit: AuditFolder) -> str:
    """The ``[labels]`` text of the unit column (``bakery = "bakeries"``), else "units"."""
    spec = audit.manifest.get("spec") if isinstance(audit.manifest, dict) else None
    if not isinstance(spec, dict):
        return "units"
    unit = (spec.get("data") or {}).get("unit")
    labels = spec.get("labels") or {}
    return str(labels.get(unit, "units")) if isinstance(labels, dict) else "units"


def _run(audit: AuditFolder) -> dict:
    run = audit.manifest.get("influence") if isinstance(audit.manifest, dict) else None
    return run if isinstance(run, dict) else {}


def _base_units(audit: AuditFolder) -> int | None:
    try:
        n = float(audit.base_row()["units"])
    except (KeyError, TypeError, ValueError, IndexError):
        return None
    return int(n) if math.isfinite(n) else None


def _firing(audit: AuditFolder, term: str):
    try:
        tv = audit.verdict.term(term)
    except KeyError:
        return None, {}
    fired = next((f for f in tv.rules if f.id == "few_units_flip"), None)
    return fired, dict(tv.figures.get("dropping") or {})


def headline(audit: AuditFolder, term: str) -> str:
    """The referee sentence for one term (empty when the term was not searched)."""
    inf = audit.dropping["influence.csv"] if audit.dropping else None
    if inf is None or not ((inf["term"] == term) & (inf["variant"] == audit.base_variant)).any():
        return ""
    noun, label = unit_noun(audit), term_text(audit, term)
    fired, figs = _firing(audit, term)
    smallest = figs.get("base_smallest")
    n = _base_units(audit)
    share = float(_run(audit).get("max_drop_share", math.nan))
    flip = 100 * float(audit.thresholds.get("flip_share", math.nan))
    if smallest:
        text = flip_phrase(smallest, label, noun)
        text = text[:1].upper() + text[1:]
        if fired is not None and fired.figures.get("scope") == "base":
            text += (f" (at most the {flip:g}% of the {noun} the few_units_flip rule looks "
                     "at: the conclusion rests on a handful of them)")
        else:
            text += f" (more than the {flip:g}% the few_units_flip rule looks at)"
    else:
        k = int(math.floor(share * n + 1e-9)) if n and math.isfinite(share) else None
        within = (f"{units_text(k, n, noun)}" if k is not None else f"{share:.0%} of the {noun}")
        text = (f"No set of up to {within} found by the greedy search reverses the "
                f"conclusion about {label}")
    flipped = figs.get("variants_flipped") or []
    analysed = int(figs.get("variants_analysed") or 0)
    if analysed and flipped:
        text += (f"; dropping at most {flip:g}% of the {noun} overturns it in {len(flipped)} "
                 f"of the {analysed} other acceptable variants analysed")
    elif analysed:
        text += (f"; in none of the {analysed} other acceptable variants analysed does "
                 f"dropping at most {flip:g}% of the {noun} overturn it")
    return text + "."


def referee_sentences(audit: AuditFolder) -> str:
    """The paragraph for referee.txt: one sentence per searched focus term, then the
    reading once."""
    items = [headline(audit, t) for t in audit.focus]
    items = [s for s in items if s]
    if not items:
        return ""
    return (" ".join(items) + " Sets of units were found by the additive approximation "
            "and a greedy search with an exact refit at every step (Broderick, Giordano & "
            "Meager 2020; Huang et al. 2024); they show which sample would overturn the "
            "result, not which sample is right.")


# ---------------------------------------------------------------------------
def _g(x, digits=3) -> str:
    try:
        x = float(x)
    except (TypeError, ValueError):
        return "n/a"
    return "n/a" if not math.isfinite(x) else f"{x:.{digits}g}"


def _p(x) -> str:
    try:
        x = float(x)
    except (TypeError, ValueError):
        return "n/a"
    if not math.isfinite(x):
        return "n/a"
    return "< 0.0001" if x < 1e-4 else (f"{x:.2g}" if x < 0.1 else f"{x:.2f}")


def _ids(text) -> str:
    ids = str(text or "").split() if isinstance(text, str) else []
    shown = " ".join(ids[:SHOWN_IDS])
    return shown + (f" … (+{len(ids) - SHOWN_IDS})" if len(ids) > SHOWN_IDS else "")


def _term_table(audit: AuditFolder, term: str) -> list[dict]:
    inf = audit.dropping["influence.csv"]
    rows = inf[(inf["variant"] == audit.base_variant) & (inf["term"] == term)]
    n = _base_units(audit)
    noun = unit_noun(audit)
    out = []
    for r in rows.to_dict("records"):
        reached = bool(r["reached"]) if not pd.isna(r["reached"]) else False
        k = int(r["units_dropped"])
        out.append({"target": LABELS.get(DropTarget(r["target"]), r["target"]),
                    "reached": "yes" if reached else
                    f"not within {100 * float(_run(audit).get('max_drop_share', math.nan)):g}%",
                    "units": units_text(k, n, noun) if reached else "—",
                    "estimate": _g(r["estimate"]), "std_error": _g(r["std_error"]),
                    "p_value": _p(r["p_value"]),
                    "dropped": _ids(r["dropped_units"]) if reached else ""})
    return out


def _top_units(audit: AuditFolder, term: str) -> list[dict]:
    top = audit.dropping["influence_units.csv"]
    rows = top[top["term"] == term].sort_values("rank").head(SHOWN_UNITS)
    return [{"rank": int(r["rank"]), "unit": str(r["unit"]),
             "change_in_se": _g(r["change_in_se"], 2),
             "share": f"{100 * float(r['share_of_data']):.2g}%"}
            for r in rows.to_dict("records")]


def _periods_text(audit: AuditFolder, term: str) -> str:
    per = audit.dropping["periods.csv"]
    rows = per[(per["variant"] == audit.base_variant) & (per["term"] == term)]
    est = pd.to_numeric(rows["estimate"], errors="coerce")
    ok = rows[np.isfinite(est.to_numpy(float))]
    if ok.empty:
        return ""
    lo, hi = ok.loc[ok["estimate"].idxmin()], ok.loc[ok["estimate"].idxmax()]
    failed = len(rows) - len(ok)
    text = (f"Leaving out one period at a time, the base estimate ranges from "
            f"{_g(lo['estimate'])} (without {int(lo['period'])}) to {_g(hi['estimate'])} "
            f"(without {int(hi['period'])}); significant at {100 * audit.alpha:g}% in "
            f"{int((ok['p_value'] < audit.alpha).sum())} of {len(ok)} refits")
    if failed:
        text += f" ({failed} could not be estimated)"
    return text + "."


def render_dropping_figures(audit: AuditFolder, out_dir, *, formats=("png", "svg", "pdf")) -> list:
    """The greedy-path figure of each searched focus term."""
    import matplotlib
    from .figures.dropping_path import plot_dropping_path
    from .figures.render import FigureFile, _save
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    path = audit.dropping["influence_path.csv"]
    others = [v for v in dict.fromkeys(path["variant"].astype(str)) if v != audit.base_variant]
    n = _base_units(audit)
    flip = audit.thresholds.get("flip_share")
    flip_units = math.floor(flip * n + 1e-9) if (flip is not None and n) else None
    made = []
    with matplotlib.rc_context({"svg.hashsalt": "robustgmm", "svg.fonttype": "path",
                                "pdf.fonttype": 42}):
        for term in audit.focus:
            if not ((path["term"] == term) & (path["variant"] == audit.base_variant)).any():
                continue
            fig = Figure(figsize=(8.0, 3.6))
            plot_dropping_path(fig.add_subplot(), path, term, audit.base_variant, others,
                               audit.alpha, flip_units, term_text(audit, term),
                               unit_noun(audit))
            name = f"dropping_{slug(term)}"
            png, paths = _save(fig, out_dir, name, formats)
            made.append(FigureFile(name, f"Dropping the most influential units: {term}",
                                   "dropping", term, png, tuple(paths)))
    return made


CAPTION = ("The line is the base model's estimate of {term} as the most influential "
           "{noun} are dropped one at a time (the greedy search against the base model's "
           "conclusion: towards the opposite sign when the estimate is significant, towards "
           "significance when it is not; each point an exact refit), with its {level} interval shaded; the dashed line "
           "is the significance boundary (the estimate is significant while it lies beyond "
           "it), the dotted line the few_units_flip share. Grey lines: other acceptable "
           "variants analysed.")


def section_context(audit: AuditFolder, figures) -> dict | None:
    """Everything the HTML partial and the Markdown section show (None: no analysis)."""
    import base64
    if not audit.dropping:
        return None
    noun = unit_noun(audit)
    terms = []
    for term in audit.focus:
        rows = _term_table(audit, term)
        if not rows:
            continue
        terms.append({"term": term, "label": term_text(audit, term), "rows": rows,
                      "sentence": headline(audit, term), "units": _top_units(audit, term),
                      "periods": _periods_text(audit, term)})
    run = _run(audit)
    not_searched = [t for t in run.get("not_searched", []) if t in audit.focus]
    return {
        "terms": terms, "reading": READING, "noun": noun,
        "scope": ("the base model" if run.get("scope") == "base" else
                  "the base model and every acceptable variant"),
        "max_drop_share": f"{100 * float(run.get('max_drop_share', math.nan)):g}%",
        "flip_share": f"{100 * float(audit.thresholds.get('flip_share', math.nan)):g}%",
        "not_searched": ", ".join(not_searched),
        "failures": dict(run.get("failures") or {}),
        "figures": [{"name": f.name, "title": f.title,
                     "caption": CAPTION.format(term=term_text(audit, f.term), noun=noun,
                                               level=f"{1 - audit.alpha:.0%}"),
                     "data": base64.b64encode(f.png).decode("ascii"),
                     "png": f"figures/{f.name}.png",
                     "files": ", ".join(f"figures/{p.name}" for p in f.paths)}
                    for f in figures],
    }


def markdown_section(ctx: dict | None) -> str:
    """The section in Markdown (the same content as the HTML partial); user text (term
    labels, unit ids, variant ids) escaped or in code spans."""
    from .markdown import code, esc
    if not ctx:
        return ""
    lines = ["## Does a handful of units drive the result?", "",
             f"Searched for {esc(ctx['scope'])}, up to {ctx['max_drop_share']} of the "
             f"{esc(ctx['noun'])}; the rule few\\_units\\_flip looks at sets of at most "
             f"{ctx['flip_share']}.", "", f"*{esc(ctx['reading'])}*", ""]
    if ctx["not_searched"]:
        lines += [f"Not searched (no estimate in the analysed models, e.g. a long-run effect without a steady state): {code(ctx['not_searched'])}.", ""]
    for vid, why in ctx["failures"].items():
        lines += [f"The analysis of variant {code(vid)} could not run: {esc(why)}.", ""]
    for t in ctx["terms"]:
        lines += [f"### Dropping units: {code(t['label'])}", "", esc(t["sentence"]), "",
                  "| target | reached | units dropped | estimate | SE | p | dropped (in order) |",
                  "|---|---|---|---|---|---|---|"]
        for r in t["rows"]:
            dropped = code(r["dropped"]) if r["dropped"] else ""
            lines.append(f"| {esc(r['target'])} | {esc(r['reached'])} | {esc(r['units'])} | "
                         f"{r['estimate']} | {r['std_error']} | {r['p_value']} | {dropped} |")
        lines.append("")
        if t["units"]:
            lines.append("Most influential: " + "; ".join(
                f"{code(u['unit'])} ({u['change_in_se']} SE if dropped, {u['share']} of the "
                "data)" for u in t["units"]) + ".")
            lines.append("")
        if t["periods"]:
            lines += [esc(t["periods"]), ""]
    for f in ctx["figures"]:
        lines += [f"![{esc(f['title'])}]({f['png']})", "", f"*How to read:* {esc(f['caption'])}", ""]
    return "\n".join(lines)
