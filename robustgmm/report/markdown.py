"""report.md: the HTML report's content as Markdown, for plain-text review.

Term labels and other user text go into code spans (which Markdown renderers never
interpret as markup) or are escaped; figures are linked from ``figures/``.
"""
from __future__ import annotations

import re

_ENTITY = re.compile(r"&(?=#?[A-Za-z0-9]+;?)")
_TAG = re.compile(r"<(?=[A-Za-z/!?])")
_SPECIAL = re.compile(r"([\\`*_{}\[\]|~])")


def esc(text) -> str:
    """Escape Markdown punctuation and the HTML specials in running text/cells."""
    # Only what could start raw HTML or an entity is turned into an entity, so that
    # "p <0.001" and "Simmons & Nelson" stay readable in the plain file.
    text = _ENTITY.sub("&amp;", str(text))
    text = _TAG.sub("&lt;", text)
    text = _SPECIAL.sub(r"\\\1", text)
    return text.replace("\r", " ").replace("\n", " ")


def code(text) -> str:
    """A code span that survives backticks inside ``text`` (CommonMark rule)."""
    text = str(text).replace("\n", " ")
    ticks = max((len(m) for m in re.findall(r"`+", text)), default=0) + 1
    fence = "`" * ticks
    pad = " " if text.startswith("`") or text.endswith("`") else ""
    return f"{fence}{pad}{text}{pad}{fence}"


def _table(headers, rows) -> list[str]:
    out = ["| " + " | ".join(esc(h) for h in headers) + " |",
           "|" + "|".join("---" for _ in headers) + "|"]
    for row in rows:
        out.append("| " + " | ".join(row) + " |")
    return out


def _rule_lines(rule: dict) -> list[str]:
    line = f"- **{esc(rule['id'])}**" + (f" \\[{esc(rule['effect'])}\\]" if rule["effect"] else "")
    if rule["description"]:
        line += f": {esc(rule['description'])}"
    if rule["figures"]:
        line += f" — {esc(rule['figures'])}"
    out = [line]
    if rule["source"] or rule["threshold"]:
        extra = f"threshold {esc(rule['threshold'])}; " if rule["threshold"] else ""
        out.append(f"  ({extra}source: {esc(rule['source'] or 'not stated')})")
    return out


def _term_heading(t: dict) -> str:
    """'Leverage (`x[t]`)' for a term with a ``[labels]`` text, else '`x[t]`'."""
    return f"{esc(t['label'])} ({code(t['term'])})" if t.get("label") else code(t["term"])


def _base_model(ctx: dict) -> list[str]:
    """The full base-model table: every term, then its tests and counts."""
    b = ctx["base_table"]
    names = ctx["term_names"]
    md = [f"## Base model (variant {code(b['variant'])})", ""]
    md += _table(["term", "estimate", "s.e.", "z", "p"],
                 [[code(t["term"]) + (f" {esc(names[t['term']])}" if t["term"] in names else ""),
                   esc(t["estimate"]), esc(t["std_error"]), esc(t["z"]), esc(t["p"])]
                  for t in b["terms"]])
    md.append("")
    md += _table(["test", "p", "df"],
                 [[esc(f"{group}: {name}"), esc(p), esc(df)] for group, name, p, df in b["tests"]])
    md.append("")
    md += _table(["count", "value"], [[esc(name), esc(value)] for name, value in b["counts"]])
    if b["se_kind"]:
        md += ["", f"Standard errors: {esc(b['se_kind'])}."]
    return md + [""]


def _drivers(ctx: dict) -> list[str]:
    """What drives each estimate: one table per focus term that has drivers."""
    terms = [t for t in ctx["terms"] if t["drivers"]]
    if not terms:
        return []
    md = ["## What drives each estimate", "", esc(ctx["drivers_note"]), ""]
    for t in terms:
        md += [f"### {_term_heading(t)}", ""]
        md += _table(["setting", "value", "variants", "mean estimate", "share significant",
                      "shift"],
                     [[esc(d["setting"]), esc(d["value"]), str(d["variants"]), esc(d["mean"]),
                       esc(d["share"]), esc(d["shift"])] for d in t["drivers"]])
        md.append("")
    return md


def render_markdown(ctx: dict) -> str:
    """The report as Markdown from :func:`robustgmm.report.context.build_context`."""
    md: list[str] = [f"# {esc(ctx['title'])}", "", esc(ctx["subtitle"]), ""]
    if ctx["base_statement"]:
        md += [f"> **{esc(ctx['base_statement'])}** Every verdict is therefore "
               "inconclusive.", ""]
    md += [f"> **Caution.** {esc(ctx['caution'])}", "",
           "## Verdict per focus term", "", f"Variants: {esc(ctx['evidence'])}.", ""]
    if ctx["closest"]:
        c = ctx["closest"]
        md += [f"**Closest acceptable variant:** {code(c['variant'])} (changes "
               f"{esc(c['changed'])}); estimates {esc(c['estimates'])}. Model-file lines "
               "that make it the base:", ""]
        md += [f"    {line}" for line in c["lines"]] + [""]
    for t in ctx["terms"]:
        md.append(f"### {_term_heading(t)}: **{(t['verdict'] or 'no verdict').upper()}**")
        md.append("")
        md.append(f"**Why:** {esc(t['reason'])}.")
        md.append("")
        md.append(f"- Base model: **{esc(t['base'])}** (s.e. {esc(t['base_se'])}, "
                  f"p {esc(t['base_p'])})")
        md.append(f"- Range over {t['n']} {t['judged']} variants: {esc(t['low'])} to "
                  f"{esc(t['high'])} (median {esc(t['median'])})")
        md.append(f"- Positive in {t['n_positive']}, negative in {t['n_negative']}; "
                  f"significant at {esc(ctx['alpha'])} in {t['n_significant']} of {t['n']}")
        if t["n"] != t["n_ok"]:
            md.append(f"- Over all {t['n_ok']} estimated variants: {esc(t['ok_low'])} to "
                      f"{esc(t['ok_high'])}")
        if t["n_untestable"] or t["n_duplicates"]:
            md.append(f"- Not counted: {t['n_untestable']} untestable, {t['n_duplicates']} "
                      f"duplicate variants")
        if t["influence"]:
            i = t["influence"]
            md.append(f"- Modeling SD {esc(i['modeling'])}, sampling SD {esc(i['sampling'])}, "
                      f"robustness ratio {esc(i['ratio'])} (Young & Holsteen 2017)")
        if t["truth"] is not None:
            md.append(f"- True value in the simulated data: {esc(t['truth'])}")
        md.append("")
        if t["rules"]:
            md.append("Rules that fired:")
            md.append("")
            for rule in t["rules"]:
                md.extend(_rule_lines(rule))
        else:
            md.append("No rule fired.")
        if t["passed"]:
            md += ["", f"Checked and not fired: {esc(t['passed'])}."]
        if t["not_evaluated"]:
            md += ["", f"Not evaluated: {esc(t['not_evaluated'])}."]
        md.append("")
    if ctx["flags"]:
        md += ["### Model-level flags", ""]
        for rule in ctx["flags"]:
            md.extend(_rule_lines(rule))
        md.append("")
    md += _base_model(ctx)
    md += _drivers(ctx)
    md += ["## Paragraphs for a referee response", ""]
    for para in ctx["referee"]:
        md += [f"> {esc(para)}", ">"]
    md[-1:] = ["", "(Also in `referee.txt`.)", ""]
    if ctx["truth"]:
        md += ["## Known truth", "",
               "The data were simulated, so the true parameter values are known"
               + (f" ({esc(ctx['truth_note'])})" if ctx["truth_note"] else "")
               + ". A robust verdict is good news only if the estimates also sit near the "
                 "truth.", ""]
        md += _table(["term", "true value", "base estimate", "range over variants",
                      "truth inside range"],
                     [[_term_heading(r), esc(r["truth"]), esc(r["base"]),
                       f"{esc(r['low'])} to {esc(r['high'])}", esc(r["inside"])]
                      for r in ctx["truth"]])
        md.append("")
    md += ["## Figures", ""]
    for f in ctx["figures"]:
        md += [f"### {esc(f['title'])}", "", f"![{esc(f['title'])}]({f['png']})", "",
               f"**How to read:** {esc(f['caption'])} Files: {esc(f['files'])}.", ""]
    if ctx.get("dropping_md"):  # where the HTML report has it: after the figures
        md += [ctx["dropping_md"], ""]
    if ctx.get("simulation_md"):  # where the HTML report has it: after the figures
        md += [ctx["simulation_md"], ""]
    md += ["## Variants", "", esc(ctx["counts"]), ""]
    md += _table(ctx["headers"], [[(f"**{esc(c.text)}**" if base and c.text else esc(c.text))
                                   for c in cells] for base, _, cells in ctx["rows"]])
    if ctx.get("strength_note"):
        md += ["", f"**Instrument strength.** {esc(ctx['strength_note'])}"]
    if ctx["numerical_warnings"]:
        md += ["", "## Numerical warnings", "",
               "Recorded by the estimation; the affected results deserve a second look.", ""]
        md += [f"- {esc(w['text'])} ({w['n']} variant{'s' if w['n'] != 1 else ''}: "
               f"{esc(w['variants'])})" for w in ctx["numerical_warnings"]]
    md += ["", "## Bounds for the autoregressive coefficient", "",
           "Pooled OLS is biased up and the within (fixed-effects) estimator biased down "
           "(Nickell 1981); a consistent estimate lies between them (Bond, Hoeffler & "
           "Temple 2001; Bond 2002).", ""]
    md += _table(ctx["bounds_headers"], [[esc(c) for c in row] for row in ctx["bounds_rows"]])
    if ctx["bounds_note"]:
        md += ["", esc(ctx["bounds_note"])]
    md += ["", "## Rules, sources and thresholds", ""]
    md += _table(["rule", "what it checks", "effect", "threshold", "source"],
                 [[code(r["id"]), esc(r["description"]), esc(r["effect"]), esc(r["threshold"]),
                   esc(r["source"])] for r in ctx["catalogue"]])
    if ctx["combination"]:
        md += ["", f"**How the rules combine:** {esc(ctx['combination'])}"]
    md += ["", f"**Thresholds in force:** {esc(ctx['thresholds'])}."]
    md += ["", "\"Common practice\" marks a rule of thumb with no single published source.",
           "", "## Provenance", ""]
    md += _table(["item", "value"], [[esc(k), esc(v)] for k, v in ctx["provenance_short"]])
    md += ["", "The settings, the grid and the timings are in `manifest.json`."]
    md += ["", "---", "", f"**What this report does not show.** {esc(ctx['caution'])}", "",
           f"Written by robustgmm {esc(ctx['version'])} from the files in this folder; "
           f"rebuild with `robustgmm report FOLDER`.", ""]
    return "\n".join(md)
