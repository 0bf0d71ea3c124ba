"""Plain-language paragraphs for a referee response, with the audit's numbers.

Every verdict, reason, count and threshold comes from ``verdict.json`` (through
:func:`robustgmm.report.summary.summarize`): the rules are evaluated once, in
:mod:`robustgmm.audit.verdicts`, and this module only words their results. The
paragraphs are: the base model's failure first (when it fails its tests), the
evidence (how many specifications pass, cannot be tested, are rejected), one short
paragraph per focus term (verdict, reason, the setting it depends on, the cautions
that fired), and the caution about instrument validity once at the end.
"""
from __future__ import annotations

from ..options import Equations, Errors, Form, Steps, Transform, label
from .inputs import AuditFolder
from .summary import (AuditSummary, TermSummary, fmt, fmt_int, fmt_p, setting_phrase,
                      summarize, varied_text)

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


def _pct(x) -> str:
    return f"{100 * float(x):g}%"


def _cap(text: str) -> str:
    return text[:1].upper() + text[1:] if text else text


def _join(parts: list[str]) -> str:
    return parts[0] if len(parts) == 1 else ", ".join(parts[:-1]) + " and " + parts[-1]


def value_phrase(setting: str, value: str) -> str:
    """'per-period instruments', 'system GMM', 'the last instrument lag at 3',
    'x exogenous'."""
    kinds = {"equations": Equations, "transform": Transform, "form": Form, "errors": Errors,
             "steps": Steps}
    if setting in kinds:
        try:
            return label(kinds[setting], int(value) if value.isdigit() else value)
        except (ValueError, KeyError):
            return f"{setting} = {value}"
    if setting == "time_effects":
        return "time effects" if value in ("true", "True") else "no time effects"
    if setting.startswith("role:"):
        return f"{setting[5:]} {value}"
    if setting == "outcome_lags":
        return f"outcome lags {value}"
    if setting.startswith("lags:"):
        return f"{setting[5:]} lags {value}"
    if setting.startswith("instrument_lags:"):
        return f"{setting[len('instrument_lags:'):]} instrumented by lags {value}"
    if setting == "drop":
        return "no regressor left out" if value == "[]" else f"{value} left out"
    if setting == "sample":
        return f"the sample {value}"
    if setting == "last_lag" and value == "all":
        return "every available lag as instrument"
    if setting in ("first_lag", "last_lag"):
        return f"the {setting.split('_')[0]} instrument lag at {value}"
    return f"{setting} = {value}"


# clauses for the cautions a term can get (the figures come from verdict.json)
def _caution_clause(rule) -> str:
    f = rule.figures
    if rule.id == "spread":
        return (f"variant {f.get('variant')} lies {fmt(f.get('max_distance'), 2)} standard "
                f"errors of the difference from the base estimate (threshold "
                f"{rule.threshold:g})")
    if rule.id == "ar_outside_band":
        return f"the base estimate lies {f.get('position')} the within-OLS band"
    if rule.id == "ar_near_within":
        return (f"the base estimate is within one standard error of the within estimate "
                f"({fmt(f.get('fe'))}), a sign of weak instruments (Bond, Hoeffler and "
                f"Temple, 2001)")
    return (rule.description or rule.id.replace("_", " ")).rstrip(".")


def _driver_sentence(term: TermSummary) -> str:
    key = term.key_driver
    if not key or len(key.get("values") or ()) < 2:
        return ""
    setting = str(key["setting"])
    values = key["values"]
    if key.get("basis") == "significance":
        parts = [f"{v['significant']} of the {v['variants']} with "
                 f"{value_phrase(setting, str(v['value']))}" for v in values]
        return f"It is significant in {_join(parts)}."
    parts = [f"{fmt(v['mean_estimate'])} with {value_phrase(setting, str(v['value']))}"
             for v in values]
    return (f"Its size depends most on {setting_phrase(setting)}: on average "
            f"{_join(parts)}.")


def _influence_sentence(term: TermSummary) -> str:
    inf = term.influence
    if inf is None:
        return ""
    return (f"Its modeling standard deviation across these specifications is "
            f"{fmt(inf.modeling_sd)} against a sampling standard deviation of "
            f"{fmt(inf.sampling_sd)} (robustness ratio {fmt(inf.robustness_ratio, 2)}; "
            f"Young and Holsteen, 2017).")


def term_paragraph(term: TermSummary, s: AuditSummary) -> str:
    """One short paragraph: the verdict across the judged specifications, its reason,
    the setting it depends on, the evidence left out, and every caution that fired."""
    pct = _pct(s.alpha)
    judged = "acceptable" if not s.count_untestable else "acceptable or untestable"
    if term.n == 0:
        if term.n_ok:
            text = (f"No specification that passes its tests estimates the coefficient on "
                    f"{term.named}; over all {term.n_ok} estimated specifications it ranges "
                    f"from {fmt(term.ok_low)} to {fmt(term.ok_high)}. It is "
                    f"{term.verdict}: {term.reason}.")
        else:
            text = (f"The coefficient on {term.named} could not be estimated in any "
                    f"specification; it is {term.verdict}.")
        return text
    spec_word = "specification" if term.n == 1 else "specifications"
    head = f"The coefficient on {term.named} is {term.verdict} across the {term.n} {judged} {spec_word}"
    if term.n == 1:
        core = (f"{head}: it is {fmt(term.low)} (standard error "
                f"{fmt(term.base_std_error)}, {_p_phrase(term.base_p_value)})")
    else:
        sign = (f"negative in {_of(term.n_negative, term.n)}" if term.n_negative > term.n_positive
                else f"positive in {_of(term.n_positive, term.n)}")
        core = (f"{head}: it stays between {fmt(term.low)} and {fmt(term.high)} (base model "
                f"{fmt(term.base_estimate)}, standard error {fmt(term.base_std_error)}); it is "
                f"{sign} and significant at the {pct} level in {_of(term.n_significant, term.n)}")
    if term.n < term.n_ok and (fmt(term.ok_low), fmt(term.ok_high)) != (fmt(term.low),
                                                                         fmt(term.high)):
        core += (f" (over all {term.n_ok} estimated specifications, {fmt(term.ok_low)} to "
                 f"{fmt(term.ok_high)})")
    # a robust term significant with one sign everywhere: the verdict's reason only
    # restates the counts just given, in the audit's words ("informative variants")
    restates = (term.verdict == "robust" and term.n > 1 and term.sign_stable
                and term.n_significant == term.n)
    sentences = [core + "."] + ([] if restates else [_cap(term.reason) + "."])
    sentences.append(_driver_sentence(term))
    sentences.append(_influence_sentence(term))
    left_out = []
    if term.n_insignificant_opposite:
        left_out.append(f"{_count_phrase(term.n_insignificant_opposite, 'acceptable specification')}"
                        f" with the opposite sign {'is' if term.n_insignificant_opposite == 1 else 'are'}"
                        f" far from significant")
    if term.uninformative:
        k = len(term.uninformative)
        left_out.append(f"{_count_phrase(k, 'specification')} with a standard error above "
                        f"{s.thresholds.get('uninformative_se_ratio', 3):g} times the base "
                        f"model's {'is' if k == 1 else 'are'} uninformative and left out of "
                        f"the comparison")
    if term.n_untestable and not s.count_untestable:
        left_out.append(f"{_count_phrase(term.n_untestable, 'untestable specification')} "
                        f"(exactly identified) {'is' if term.n_untestable == 1 else 'are'} "
                        f"shown but not counted")
    if left_out:
        sentences.append(_cap("; ".join(left_out)) + ".")
    cautions = term.cautions
    if cautions:
        sentences.append("Caution: " + "; ".join(_caution_clause(r) for r in cautions) + ".")
    return " ".join(x for x in sentences if x)


def _tests_text(s: AuditSummary) -> str:
    """Which specification tests make a variant acceptable, and at what level: the
    over-identification and serial-correlation tests, and the underidentification test
    of rule ``underidentified`` (without it a variant rejected only for
    underidentification would seem to pass every test named)."""
    t = s.thresholds
    levels = {t["hansen_reject"], t["ar2_reject"], t["difference_hansen_reject"]}
    under = (f"and the Kleibergen-Paap rank test rejecting underidentification at the "
             f"{_pct(s.alpha)} level where it is valid")
    if len(levels) == 1:
        return (f"Hansen, AR(2) and, in system GMM, difference-in-Hansen for the level "
                f"equation, at the {_pct(levels.pop())} level, {under}")
    return (f"Hansen at {_pct(t['hansen_reject'])}, AR(2) at {_pct(t['ar2_reject'])} "
            f"and, in system GMM, difference-in-Hansen for the level equation at "
            f"{_pct(t['difference_hansen_reject'])}, {under}")


def _base_paragraph(s: AuditSummary) -> str:
    """Said first when the base model is no anchor: why, and the closest acceptable
    specification with the model-file lines that would make it the base."""
    if s.base_acceptable or not s.base_statement:
        return ""
    text = s.base_statement + " Every verdict is therefore inconclusive."
    c = s.closest
    if c:
        changed = c.get("changed") or {}
        how = _join([f"{value_phrase(k, str(v))}" for k, v in changed.items()]) \
            if changed else "the same settings"
        ests = _join([f"{s.named(t)} at {fmt(v)}" for t, v in (c.get("estimates") or {}).items()])
        text += (f" The closest specification that passes its tests is variant "
                 f"{c['variant']} ({how}), which estimates {ests}")
        lines = c.get("model_file_lines") or []
        text += (f"; to make it the base model, set {'; '.join(lines)}." if lines else ".")
    else:
        text += " No specification passes its tests."
    return text


def _evidence_paragraph(s: AuditSummary) -> str:
    varied = varied_text(s)
    n_spec = s.n_ok
    if varied:
        opening = f"Across {n_spec} estimated specifications varying {varied}"
    elif n_spec == 1:
        opening = "In the single estimated specification"
    else:
        opening = f"In the {n_spec} estimated specifications" if n_spec else \
            f"Of the {s.n_variants} specifications planned,"
    if not n_spec:
        return " ".join([opening + " nothing could be estimated."] + _not_run(s))
    count = "none" if s.n_acceptable == 0 else (
        "all" if s.n_acceptable == n_spec and n_spec > 1 else str(s.n_acceptable))
    verb = "passes" if s.n_acceptable == 1 else "pass"
    parts = [f"{count} {verb} {'its' if s.n_acceptable == 1 else 'their'} specification tests "
             f"({_tests_text(s)})"]
    if s.n_untestable:
        parts.append(f"{s.n_untestable} cannot be tested (exactly identified)")
    if s.n_rejected:
        parts.append(f"{s.n_rejected} {'is' if s.n_rejected == 1 else 'are'} rejected by "
                     f"{'its' if s.n_rejected == 1 else 'their'} tests")
    text = f"{opening}, {_join(parts)}"
    if s.n_duplicates:
        text += (f"; {_count_phrase(s.n_duplicates, 'duplicate estimate')} "
                 f"{'was' if s.n_duplicates == 1 else 'were'} merged")
    rest = "the acceptable ones" + (" and the untestable ones" if s.count_untestable else "")
    text += f". The verdicts rest on {rest}."
    sentences = [text]
    for band in s.bands:
        sentences.append(
            f"The autoregressive coefficient {s.named(band.term)} lies between the within "
            f"(fixed-effects) estimate of {fmt(band.fe)} and the pooled OLS estimate of "
            f"{fmt(band.ols)} in {_of(band.n_inside, band.n)}"
            f"{' specifications' if band.n > 2 else ''}; a consistent "
            f"estimate is expected between these two biased ones (Bond, Hoeffler and "
            f"Temple, 2001).")
    diag = []
    t = s.thresholds
    if s.hansen_low == s.hansen_low:  # not NaN
        diag.append(f"the Hansen test p-value is {fmt_p(s.hansen_low)}"
                    if fmt_p(s.hansen_low) == fmt_p(s.hansen_high) else
                    f"the Hansen test p-value ranges from {fmt_p(s.hansen_low)} to "
                    f"{fmt_p(s.hansen_high)}")
    if s.n_ar2:
        diag.append(f"the AR(2) test rejects at the {_pct(t['ar2_reject'])} level in "
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
        sentences.append(_cap("; ".join(diag)) + ".")
    cautions = []
    near_one = {str(i) for r in s.model_flags if r.id == "hansen_p_near_one"
                for i in (r.figures.get("ids") or ())}
    for rule in s.model_flags:
        k, n = rule.figures.get("variants", 0), rule.figures.get("of_ok", s.n_ok)
        if rule.id == "hansen_p_high" and near_one and \
                {str(i) for i in (rule.figures.get("ids") or ())} <= near_one:
            continue  # every one of them is the near-one case, said next
        if rule.id == "hansen_p_high":
            cautions.append(f"the Hansen p-value is at or above {t['hansen_too_high']:g} with "
                            f"at least {t['instruments_per_unit_warn']:g} instruments per unit "
                            f"(or about 1) in {k} of {n}, where the test is weak (Roodman, 2009)")
        elif rule.id == "hansen_p_near_one":
            cautions.append(f"the Hansen p-value is about 1 in {k} of {n}, a sign of too many "
                            f"instruments (Roodman, 2009)")
        elif rule.id == "instruments_exceed_units":
            cautions.append(f"{k} of {n} use more than {t['instruments_per_unit']:g} "
                            f"instrument{'s' if t['instruments_per_unit'] != 1 else ''} per unit")
        elif rule.id == "weak_instruments":
            # a weak first stage biases GMM and distorts its tests: a referee must hear
            # it, the base model above all
            avail = rule.figures.get("of_available", n)
            base = rule.figures.get("base")
            base_text = (f", the base model among them (F = {fmt(rule.figures.get('base_value'), 2)})"
                         if base else "")
            cautions.append(
                f"the smallest Sanderson-Windmeijer conditional F is below "
                f"{t.get('weak_f', 10):g} in {k} of the {avail} specifications where it is "
                f"valid{base_text}, a sign of weak instruments by the rule of thumb of "
                f"Staiger and Stock (1997), common practice (no critical values exist for "
                f"cluster-robust GMM)")
    if cautions:
        sentences.append("Caution: " + "; ".join(cautions) + ".")
    return " ".join(sentences + _not_run(s))


def _not_run(s: AuditSummary) -> list[str]:
    not_run = []
    if s.n_failed:
        not_run.append(f"{_count_phrase(s.n_failed, 'further specification')} could not be "
                       f"estimated")
    if s.n_skipped:
        not_run.append(f"{_count_phrase(s.n_skipped, 'combination')} of settings "
                       f"{'was' if s.n_skipped == 1 else 'were'} skipped as impossible or "
                       f"as the same estimation as another")
    if not_run:
        return [_cap(" and ".join(not_run)) + " (reasons in the variants table)."]
    return []


def referee_paragraphs(audit: AuditFolder, summary: AuditSummary | None = None) -> list[str]:
    """The paragraphs, each one string without line breaks."""
    s = summary or summarize(audit)
    out = [_base_paragraph(s), _evidence_paragraph(s)]
    out += [term_paragraph(t, s) for t in s.terms]
    if audit.dropping:  # the dropping-units sentences (report/dropping.py), from the files
        from .dropping import referee_sentences
        out.append(referee_sentences(audit))
    out.append(CAUTION)
    return [p for p in out if p]


def referee_paragraph(audit: AuditFolder, summary: AuditSummary | None = None) -> str:
    """All paragraphs as one string (the text of referee.txt without its line breaks)."""
    return " ".join(referee_paragraphs(audit, summary))


def referee_text(audit: AuditFolder, summary: AuditSummary | None = None, width: int = 88) -> str:
    """The paragraphs wrapped for a plain-text file (referee.txt), a blank line between."""
    import textwrap
    return "\n\n".join(textwrap.fill(p, width=width, break_long_words=False,
                                     break_on_hyphens=False)
                       for p in referee_paragraphs(audit, summary)) + "\n"
