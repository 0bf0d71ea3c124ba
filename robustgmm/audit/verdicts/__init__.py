"""Verdict rules: every rule of the audit, evaluated once, here.

:func:`evaluate` takes the variant tables of an audit and returns typed records: the
per-variant columns of ``variants.csv`` (``evidence``, ``acceptable``,
``duplicate_of``, ``flags``) and the :class:`AuditVerdict` written as
``verdict.json``. Every document (terminal summary, report, Markdown, LaTeX, referee
paragraph, figures) reads these results; none of them applies a threshold again.

Each rule has an id, a plain description, its source, the threshold it uses (a field
of :class:`robustgmm.spec.Thresholds`, ``[audit.thresholds]`` in the model file, or
the audit's ``alpha``) and its effect. The catalogue :data:`RULES` is written into
``verdict.json`` with the values used.

Variant rules (every estimated variant):

* ``hansen_rejects`` — Hansen J p < ``hansen_reject`` (0.05): the overidentifying
  restrictions are rejected (Hansen 1982; Arellano & Bond 1991). **Rejected.**
* ``ar2_rejects`` — Arellano–Bond AR(2) p < ``ar2_reject`` (0.05): second-order serial
  correlation in the differenced residuals, so levels dated ``t-2`` are not valid
  instruments (Arellano & Bond 1991; common practice). **Rejected.**
* ``difference_hansen_level_rejects`` — difference-in-Hansen of the level-equation
  instruments of system GMM, p < ``difference_hansen_reject`` (0.05) (Blundell & Bond
  1998; Roodman 2009). **Rejected.**
* ``tests_unavailable`` — no test rejects, but a required test cannot be computed:
  Hansen and AR(2) always, the level-equation difference-in-Hansen in system GMM. An
  exactly identified instrument set (as many instruments as parameters) leaves the
  Hansen test nothing to test; its one- and two-step estimates coincide.
  **Untestable**: shown and counted, but judged only with ``count_untestable = true``.
* ``hansen_p_high`` — Hansen p ≥ ``hansen_too_high`` (0.25) *and* instruments per unit
  ≥ ``instruments_per_unit_warn`` (0.25), or p ≥ 0.99 at any count. Roodman (2009)
  shows the test weakening as instruments approach the number of units; with few
  instruments per unit a p-value above 0.25 is what valid instruments give three
  times in four, so alone it is no warning. The 0.25 lines are common practice and a
  robustgmm default. Caution.
* ``hansen_p_near_one`` — Hansen p ≥ 0.99 (:data:`HANSEN_NEAR_ONE`), the telltale sign
  of instrument proliferation (Roodman 2009). Caution.
* ``instruments_exceed_units`` — instruments per unit > ``instruments_per_unit`` (1.0)
  (common practice; Roodman 2009). Caution.
* ``duplicate_estimate`` — the estimates equal those of an earlier variant to
  :data:`DUPLICATE_TOLERANCE` (one- and two-step when exactly identified; a
  ``last_lag`` deeper than the data). Recorded in ``duplicate_of``; a duplicate casts
  no vote. Information.

Evidence classes (column ``evidence``, :class:`robustgmm.options.Evidence`):
``acceptable`` (estimated, every required test computed and passed), ``untestable``,
``rejected``, ``failed``, ``skipped``. ``acceptable`` (boolean) is
``evidence == "acceptable"``. The *judged* variants of a term are the acceptable ones
(plus the untestable ones with ``count_untestable``) that are not duplicates and
estimate the term.

Term rules (each focus term, over its judged variants):

* ``base_not_ok`` — the base model could not be estimated. **Inconclusive.**
* ``base_not_acceptable`` — the base model fails its own tests (or cannot be tested).
  **Inconclusive**, whatever the variants say: the rules below are anchored on the base
  model, and a base that fails its tests is no anchor. The closest acceptable
  variant is named instead (:func:`closest_acceptable`).
* ``too_few_acceptable`` — fewer than :data:`MIN_ACCEPTABLE` (2) judged variants.
  **Inconclusive.**
* ``sign_change`` — some judged variant is *significant at alpha* with the sign
  opposite to the base estimate (or significant estimates of both signs exist).
  Insignificant opposite signs are counted in the figures, not as fragility (the
  specification curve of Simonsohn, Simmons & Nelson 2020 shows them). **Fragile.**
* ``significance_flip`` — among the informative judged variants, the share reaching
  the base model's conclusion about significance at alpha (significant with the
  base's sign when the base is significant, not significant when it is not) is below
  ``significant_share`` (0.9; a robustgmm default). **Fragile.**
* ``spread`` — some informative judged variant lies more than ``spread_in_se`` (2)
  units of ``sqrt(se_base² + se_variant²)`` from the base estimate. The scale is the
  standard error of the difference of two independent estimates; estimates on the
  same data are positively correlated, so the true standard error of the difference
  is smaller and the rule is conservative (fires less often). A variant is
  *uninformative* when its standard error exceeds ``uninformative_se_ratio`` (3) base
  standard errors; uninformative variants are listed and left out of this rule and of
  ``significance_flip``. Caution.
* ``few_units_flip`` — dropping at most ``flip_share`` (0.01; a robustgmm default) of
  the units reverses the sign or the significance at alpha of the base model's
  conclusion (for an insignificant estimate: makes it significant), each set found
  by the additive approximation and the greedy search and refitted exactly
  (:mod:`robustgmm.audit.dropping`; Broderick, Giordano & Meager 2020; Huang, Burt,
  Shen, Nguyen & Broderick 2024). **Fragile** in the base model; a caution when it
  happens only in other analysed variants (``[audit] influence = "all"``).
  Evaluated in :mod:`.dropping`, and whatever the base's tests say (a property of
  its estimate), though an inconclusive verdict stays inconclusive.
* ``ar_outside_band`` — for an autoregressive term: the base estimate lies outside the
  [within, pooled OLS] band of its sample (Bond, Hoeffler & Temple 2001; Bond 2002).
  Caution.
* ``ar_near_within`` — the base AR estimate lies within one base standard error of the
  within estimate, or below it: the downward bias of weak instruments (Blundell &
  Bond 1998; Bond, Hoeffler & Temple 2001). Caution.

How the rules combine (the same order for every term):

1. **inconclusive** if ``base_not_ok``, ``base_not_acceptable`` or
   ``too_few_acceptable`` fires (the base-anchored rules are then not evaluated);
2. otherwise **fragile** if ``sign_change`` or ``significance_flip`` fires, or
   ``few_units_flip`` fires in the base model;
3. otherwise **robust**. Cautions never change the verdict.

What drives each estimate (model influence; Young & Holsteen 2017, Sociological
Methods & Research 46(1), 3–40): for each varied setting and value, the judged
variants with that value, their mean estimate and share significant, and the
*shift*: the least-squares coefficient of that value's indicator in a regression of
the estimate on an intercept and indicators of every varied setting (the base
model's value is the reference, shift 0). Beside it the modeling standard deviation
``sqrt(mean((b_j - mean b)²))``, the sampling standard deviation
``sqrt(mean(se_j²))`` and the robustness ratio ``mean b / sqrt(modeling² +
sampling²)``, as defined by Young & Holsteen (2017).

None of this is proof that the instruments are valid: that rests on economic
reasoning about the model.
"""
from __future__ import annotations

from ...options import LEVEL_GROUP  # noqa: F401  (read here, written by the core)
from ...options import Effect, Evidence, Verdict  # noqa: F401
from ..records import (AuditVerdict, BaseEstimate, Driver, Evaluation, Firing, Influence,  # noqa: F401
                       Rule, TermVerdict)
from .rules import BASE_ANCHORED, COMBINATION, DISCLAIMER, DUPLICATE_TOLERANCE, EFFECT_CAUTION, EFFECT_EXCLUDE, EFFECT_FRAGILE, EFFECT_INCONCLUSIVE, FRAGILE, HANSEN_NEAR_ONE, INCONCLUSIVE, MIN_ACCEPTABLE, REJECTION_RULES, ROBUST, RULES, RULE_BY_ID, VARIANT_RULES, _fired, p_text, threshold_values, value_text  # noqa: F401
from .flags import _column, _is_system, find_duplicates, variant_flags  # noqa: F401
from .evaluation import Classified, _setting_columns, classify, conclude, evaluate, judge, variant_columns  # noqa: F401
from .context import _Context  # noqa: F401
from .base import _SECTION, _base_statement, _missing_tests, _toml_value, closest_acceptable, model_file_lines  # noqa: F401
from .terms import _drivers, _influence, _judge_term, _key_driver, _of, _reason, _share_outside  # noqa: F401
from .caution import _diagnostics, _model_flags  # noqa: F401
