"""A plain-language paragraph for a referee response, with the audit's numbers.

Every number comes from :func:`robustgmm.report.summary.summarize`, i.e. straight
from ``estimates.csv`` / ``variants.csv``; the wording is ours. The paragraph always
ends with the caution that statistical robustness does not establish instrument
validity.
"""
from __future__ import annotations

from .inputs import AuditFolder
from .summary import AuditSummary, TermSummary, fmt, fmt_int, fmt_p, summarize, varied_text

CAUTION = ("These checks are statistical: they show how much the conclusions depend on "
           "choices the theory leaves open, but they do not establish that the "
           "instruments are valid, which rests on economic reasoning about the "
           "timing of shocks and decisions.")


def _of(k: int, n: int) -> str:
    if n and k == n:
        return {1: "the single specification", 2: "both"}.get(n, f"all {n}")
    return f"{k} of {n}"


def _p_phrase(p) -> str:
    text = fmt_p(p)
    return f"p < {text[1:]}" if text.startswith("<") else f"p = {text}"


def _count_phrase(k: int, noun: str) -> str:
    return f"{k} {noun}{'s' if k != 1 else ''}"


def _rule_names(term: TermSummary) -> str:
    names = []
    for rule in term.fired:
        text = rule.description.strip() or rule.id.replace("_", " ")
        names.append(text.rstrip("."))
    return "; ".join(names)


def term_sentence(term: TermSummary, alpha: float, lead: str) -> str:
    """One sentence per focus term; ``lead`` is the opening words up to 'the
    coefficient on' (e.g. 'Across 24 estimated specifications varying ...,')."""
    pct = f"{100 * alpha:g}%"
    subject = f"{lead} the coefficient on {term.term}" if lead else \
        f"The coefficient on {term.term}"
    if term.n == 0:
        return f"{subject} could not be estimated in any specification."
    if term.n == 1:
        core = (f"{subject} is {fmt(term.low)} (standard error "
                f"{fmt(term.base_std_error)}, {_p_phrase(term.base_p_value)})")
    else:
        core = (f"{subject} stays between {fmt(term.low)} and {fmt(term.high)} "
                f"(base model {fmt(term.base_estimate)}, standard error "
                f"{fmt(term.base_std_error)}); it is positive in {_of(term.n_positive, term.n)}"
                f" and significant at the {pct} level in {_of(term.n_significant, term.n)}")
    verdict = f"we judge it {term.verdict}" if term.verdict else ""
    rules = _rule_names(term)
    if rules:
        verdict += f" ({rules})"
    return core + ("; " + verdict if verdict else "") + "."


def referee_paragraph(audit: AuditFolder, summary: AuditSummary | None = None) -> str:
    """The paragraph, as one string without line breaks."""
    s = summary or summarize(audit)
    varied = varied_text(s)
    n_spec = s.n_ok
    if varied:
        lead_first = f"Across {n_spec} estimated specifications varying {varied},"
    elif n_spec == 1:
        lead_first = "In the single estimated specification,"
    else:
        lead_first = f"In the {n_spec} estimated specifications,"
    sentences = []
    for i, term in enumerate(s.terms):
        sentences.append(term_sentence(term, s.alpha, lead_first if i == 0 else ""))
    for band in s.bands:
        sentences.append(
            f"The autoregressive coefficient {band.term} lies between the within "
            f"(fixed-effects) estimate of {fmt(band.fe)} and the pooled OLS estimate of "
            f"{fmt(band.ols)} in {_of(band.n_inside, band.n)}"
            f"{' specifications' if band.n > 2 else ''}; a consistent "
            f"estimate is expected between these two biased ones (Bond, Hoeffler and "
            f"Temple, 2001).")
    diag = []
    if s.n_ok:
        if s.hansen_low == s.hansen_low:  # not NaN
            diag.append(f"the Hansen test p-value is {fmt_p(s.hansen_low)}"
                        if fmt_p(s.hansen_low) == fmt_p(s.hansen_high) else
                        f"the Hansen test p-value ranges from {fmt_p(s.hansen_low)} to "
                        f"{fmt_p(s.hansen_high)}")
        if s.n_ar2:
            diag.append(f"the AR(2) test rejects at the {100 * s.alpha:g}% level in "
                        f"{s.n_ar2_reject} of {s.n_ar2}")
        if s.instruments_low == s.instruments_low:
            units = fmt_int(s.units_low) if s.units_low == s.units_high else \
                f"{fmt_int(s.units_low)} to {fmt_int(s.units_high)}"
            inst = fmt_int(s.instruments_low) if s.instruments_low == s.instruments_high \
                else f"from {fmt_int(s.instruments_low)} to {fmt_int(s.instruments_high)}"
            diag.append(f"the number of instruments ranges {inst} against {units} units"
                        if s.instruments_low != s.instruments_high else
                        f"every specification uses {inst} instruments against {units} units")
    if diag:
        text = "; ".join(diag)
        sentences.append(text[0].upper() + text[1:] + ".")
    not_run = []
    if s.n_failed:
        not_run.append(f"{_count_phrase(s.n_failed, 'further specification')} could not be "
                       f"estimated")
    if s.n_skipped:
        not_run.append(f"{_count_phrase(s.n_skipped, 'combination')} of settings "
                       f"{'was' if s.n_skipped == 1 else 'were'} skipped as impossible")
    if not_run:
        text = " and ".join(not_run)
        sentences.append(text[0].upper() + text[1:] + " (reasons in the variants table).")
    sentences.append(CAUTION)
    return " ".join(sentences)


def referee_text(audit: AuditFolder, summary: AuditSummary | None = None, width: int = 88) -> str:
    """The paragraph wrapped for a plain-text file (referee.txt)."""
    import textwrap
    return textwrap.fill(referee_paragraph(audit, summary), width=width,
                         break_long_words=False, break_on_hyphens=False) + "\n"
