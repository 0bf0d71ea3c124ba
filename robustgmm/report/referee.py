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


# Short clauses for the rules robustgmm.audit.verdicts applies; other rules use their
# own description.
RULE_CLAUSES = {
    "sign_change": "its sign changes across specifications",
    "significance_flip": "whether it is significant depends on the specification",
    "spread": "its size moves by more than {threshold} base-model standard errors",
    "ar_outside_band": "the base estimate lies outside the within-OLS band",
    "base_not_ok": "the base model could not be estimated",
    "base_not_acceptable": "the base model fails its own specification tests",
    "too_few_acceptable": "too few specifications pass their tests",
}
DECISIVE = ("fragile", "inconclusive")


def _clause(rule) -> str:
    text = RULE_CLAUSES.get(rule.id)
    if text is None:
        return (rule.description.strip() or rule.id.replace("_", " ")).rstrip(".")
    value = rule.threshold
    if isinstance(value, dict) and len(value) == 1:
        value = next(iter(value.values()))
    return text.format(threshold=f"{value:g}" if isinstance(value, (int, float)) else value)


def _join(parts: list[str]) -> str:
    return parts[0] if len(parts) == 1 else ", ".join(parts[:-1]) + " and " + parts[-1]


def _verdict_clause(term: TermSummary) -> str:
    """'we judge it fragile: its sign changes ... and ...' (+ cautions)."""
    if not term.verdict:
        return ""
    decisive = [r for r in term.fired if r.effect in DECISIVE or
                (not r.effect and r.id in ("sign_change", "significance_flip", "base_not_ok",
                                           "base_not_acceptable", "too_few_acceptable"))]
    caution = [r for r in term.fired if r not in decisive]
    text = f"we judge it {term.verdict}"
    if decisive:
        text += ", as " + _join([_clause(r) for r in decisive])
    if caution:
        text += (", though " if not decisive else "; also, ") + _join([_clause(r) for r in caution])
    return text


def term_sentence(term: TermSummary, alpha: float, lead: str, *, judged: str = "") -> str:
    """One sentence per focus term; ``lead`` is the opening words up to 'the
    coefficient on' (e.g. 'Across 24 estimated specifications varying ...,').
    ``judged`` names the judged subset when it is smaller than every estimated
    specification (then the full range is added)."""
    pct = f"{100 * alpha:g}%"
    subject = f"{lead} the coefficient on {term.term}" if lead else \
        f"The coefficient on {term.term}"
    if term.n == 0:
        if term.n_ok:
            return (f"No specification that passes its tests estimates the coefficient on "
                    f"{term.term}; over all {term.n_ok} estimated specifications it ranges "
                    f"from {fmt(term.ok_low)} to {fmt(term.ok_high)}; we judge it "
                    f"{term.verdict or 'not at all'}.")
        return f"{subject} could not be estimated in any specification."
    if term.n == 1:
        core = (f"{subject} is {fmt(term.low)} (standard error "
                f"{fmt(term.base_std_error)}, {_p_phrase(term.base_p_value)})")
    else:
        core = (f"{subject} stays between {fmt(term.low)} and {fmt(term.high)} "
                f"(base model {fmt(term.base_estimate)}, standard error "
                f"{fmt(term.base_std_error)}); it is {_sign_phrase(term)}"
                f" and significant at the {pct} level in {_of(term.n_significant, term.n)}")
    if judged and term.n < term.n_ok and (fmt(term.ok_low), fmt(term.ok_high)) != (
            fmt(term.low), fmt(term.high)):
        core += (f" (over all {term.n_ok} estimated specifications, {fmt(term.ok_low)} to "
                 f"{fmt(term.ok_high)})")
    verdict = _verdict_clause(term)
    return core + ("; " + verdict if verdict else "") + "."


def _sign_phrase(term: TermSummary) -> str:
    if term.n_negative > term.n_positive:
        return f"negative in {_of(term.n_negative, term.n)}"
    return f"positive in {_of(term.n_positive, term.n)}"


def _tests_text(audit: AuditFolder) -> str:
    """Which specification tests make a variant acceptable, and at what level."""
    t = audit.thresholds
    levels = {t["hansen_reject"], t["ar2_reject"], t["difference_hansen_reject"]}
    if len(levels) == 1:
        return (f"Hansen, AR(2) and, in system GMM, difference-in-Hansen for the level "
                f"equation, at the {100 * levels.pop():g}% level")
    return (f"Hansen at {100 * t['hansen_reject']:g}%, AR(2) at {100 * t['ar2_reject']:g}% "
            f"and, in system GMM, difference-in-Hansen for the level equation at "
            f"{100 * t['difference_hansen_reject']:g}%")


def referee_paragraph(audit: AuditFolder, summary: AuditSummary | None = None) -> str:
    """The paragraph, as one string without line breaks."""
    s = summary or summarize(audit)
    varied = varied_text(s)
    n_spec = s.n_ok
    if varied:
        opening = f"Across {n_spec} estimated specifications varying {varied}"
    elif n_spec == 1:
        opening = "In the single estimated specification"
    else:
        opening = f"In the {n_spec} estimated specifications"
    sentences = []
    judged = ""
    if s.has_acceptable and s.n_acceptable < s.n_ok:
        judged = "acceptable"
        count = "none" if s.n_acceptable == 0 else str(s.n_acceptable)
        verb = "passes" if s.n_acceptable == 1 else "pass"
        sentences.append(f"{opening}, {count} {verb} {'its' if s.n_acceptable == 1 else 'their'} "
                         f"specification tests ({_tests_text(audit)}); the verdicts rest on "
                         f"{'this one' if s.n_acceptable == 1 else 'these'}.")
        lead_first = "Among them,"
    elif s.has_acceptable and s.n_ok:
        lead_first = (f"{opening}, {'which passes its' if s.n_ok == 1 else 'all of which pass their'}"
                      f" specification tests ({_tests_text(audit)}),")
    else:
        lead_first = opening + ","
    for i, term in enumerate(s.terms):
        sentences.append(term_sentence(term, s.alpha, lead_first if i == 0 else "",
                                       judged=judged))
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
