"""How to read each figure, shared by the HTML and Markdown reports."""
from __future__ import annotations

CAPTIONS = {
    "spec_curve": (
        "Each dot is one estimated variant's coefficient on {term} with its confidence "
        "interval; blue marks are significant at the audit's level, grey ones are not, "
        "and the ringed dot is the base model. The variants stand in lanes, each headed "
        "by its count: on the left the acceptable ones (estimated and passing their "
        "specification tests: Hansen, AR(2), difference-in-Hansen and the "
        "underidentification test), filled and "
        "outlined, on which the verdict is judged; to the right, on a grey ground and "
        "faded, those that cannot be tested and those that fail a test. Within a lane "
        "the estimates are sorted from smallest to largest. An arrow head at the top or "
        "bottom edge marks an interval too long to draw in full (it is clipped at the "
        "axis); the axis includes zero only when zero is near the estimates. The "
        "panel underneath shows the choices each variant makes: read a column down for "
        "one variant's settings, read a row across to see where one choice puts the "
        "estimate. A robust coefficient keeps its sign and significance along the whole "
        "acceptable lane; a lane that crosses zero, or changes colour where one row of "
        "the panel switches, shows which choice the conclusion depends on "
        "(specification curve: Simonsohn, Simmons & Nelson 2020). In the SVG file, "
        "hovering over a mark shows its variant id and settings."),
    "hansen_drift": (
        "Each mark is one estimated variant: its Hansen J p-value against its number "
        "of instruments; colour gives the equations, shape the instrument form. Marks "
        "below the dashed line reject the joint validity of the instruments (Hansen "
        "1982). A p-value above the dotted warning line (0.25 by default, common "
        "practice) is suspect when the instruments are many for the units (caution "
        "hansen_p_high), and one near 1 at any count: so many instruments weaken the "
        "test (Roodman 2009); such marks usually sit to the right. The dash-dotted line is "
        "where instruments would equal units (common practice: stay left of it); when "
        "that is far beyond every variant, a note at the edge says where it lies, and "
        "the top axis gives instruments per unit."),
    "ar_band": (
        "Each dot is one estimated variant's autoregressive coefficient {term} with its "
        "confidence interval, sorted. Pooled OLS is biased up and the within "
        "(fixed-effects) estimator is biased down in short panels (Nickell 1981), so a "
        "consistent GMM estimate should lie in the shaded band between them (Bond, "
        "Hoeffler & Temple 2001; Bond 2002). Vermillion dots lie outside the band: "
        "those variants are suspect (weak instruments pull toward the within value, "
        "too many instruments toward OLS; Roodman 2009). Arrow heads at the edge mark "
        "intervals clipped at the axis."),
    "ar_sum": (
        "With several lags of the outcome its persistence is the sum of their "
        "coefficients. Each dot is one estimated variant's sum, sorted, against the "
        "band between the within and pooled OLS values of the same sum on the "
        "variant's sample (Bond, Hoeffler & Temple 2001); vermillion dots lie outside "
        "it. No interval is drawn: the audit files do not hold the covariance of the "
        "lags."),
    "diagnostics": (
        "Rows are checks, columns are variants (base first). Green passes, yellow is a "
        "warning, vermillion fails, dark grey marks a variant that could not be "
        "estimated, light grey a check that does not apply (e.g. no level-equation "
        "instruments in difference GMM) or was not reported. The identification row "
        "fails where the Kleibergen-Paap (KP) rank test does not reject "
        "underidentification and warns where the smallest Sanderson-Windmeijer (SW) "
        "conditional F is below the weak-instrument line (a rule of thumb, common "
        "practice); it is light grey where the KP test is not valid (too many "
        "instruments for the units). A column full of green is a variant with clean "
        "diagnostics, not a proof that its instruments are valid; a row with many "
        "failures points to a "
        "problem shared by the model. In the SVG file, hovering over a column shows its "
        "variant id, settings and the state of each check."),
}


def caption(kind: str, term: str | None = None) -> str:
    return CAPTIONS[kind].format(term=term or "")

