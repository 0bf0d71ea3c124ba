"""Figure 4: the diagnostics matrix, variants x checks."""
from __future__ import annotations

import numpy as np
import pandas as pd
from matplotlib.colors import ListedColormap
from matplotlib.patches import Patch

from ..labels import band_arrays
from ..inputs import AuditFolder
from matplotlib.collections import PolyCollection

from .common import (LIGHT, MAX_TICK_LABELS, VERMILLION, YELLOW, GREEN, attach_tooltips, style,
                     variant_ticks)


PASS, WARN, FAIL, NOT_ESTIMATED = 0, 1, 2, 3
STATE_NAMES = {PASS: "passes", WARN: "warning", FAIL: "fails",
               NOT_ESTIMATED: "not estimated"}


def _difference_hansen_column(frame: pd.DataFrame) -> str | None:
    """The p-value column of the difference-in-Hansen test for the level-equation
    instruments, when the audit writes one (name contains 'diff', 'hansen' and
    'level'; or a single 'diff...hansen..._p' column)."""
    cands = [c for c in frame.columns
             if "hansen" in c.lower() and "diff" in c.lower() and c.lower().endswith("p")]
    levels = [c for c in cands if "level" in c.lower()]
    if levels:
        return levels[0]
    return cands[0] if len(cands) == 1 else None


def diagnostics_table(audit: AuditFolder) -> pd.DataFrame:
    """Variants x checks with states PASS / WARN / FAIL / NOT_ESTIMATED (NaN = the
    check does not apply or was not reported). The states are the variant rules that
    :mod:`robustgmm.audit.verdicts` evaluated (column ``flags``), read, not re-derived.

    Checks: AR(2) does not reject (Arellano & Bond 1991); Hansen does not reject
    (Hansen 1982); Hansen p not suspiciously high (rule ``hansen_p_high``: at or above the warning line
    with many instruments per unit, or about 1; common practice; Roodman 2009);
    instruments do not outnumber units (common practice); difference-in-Hansen of the
    level-equation instruments does not reject (Blundell & Bond 1998; Roodman 2009);
    the Kleibergen & Paap (2006) rank test rejects underidentification (rule
    ``underidentified``, which makes a variant not acceptable), with the smallest
    Sanderson & Windmeijer (2016) conditional F below the rule-of-thumb line as a warning
    (rule ``weak_instruments``; common practice); AR coefficient inside the within-OLS
    band (Bond, Hoeffler & Temple 2001)."""
    v = audit.variants
    ok = (v["status"] == "ok").to_numpy()

    def state(bad, warn=None, valid=None):
        out = np.where(bad, FAIL, PASS).astype(float)
        if warn is not None:
            out = np.where(~bad & warn, WARN, out)
        if valid is not None:
            out = np.where(valid, out, np.nan)
        return np.where(ok, out, NOT_ESTIMATED)

    # the states are the rules robustgmm.audit.verdicts evaluated (column "flags");
    # nothing is compared with a threshold here
    fired = v["flags"].fillna("").astype(str).str.split(";") if "flags" in v.columns \
        else pd.Series([[]] * len(v), index=v.index)

    def rule(rule_id):
        return fired.map(lambda ids: rule_id in ids).to_numpy(bool)

    ar2 = v["ar2_p"].to_numpy(float)
    hansen = v["hansen_p"].to_numpy(float)
    inst = v["instruments"].to_numpy(float)
    units = v["units"].to_numpy(float)
    checks = {
        "AR(2) does not reject": state(rule("ar2_rejects"), valid=np.isfinite(ar2)),
        "Hansen does not reject": state(rule("hansen_rejects"), valid=np.isfinite(hansen)),
        "Hansen p not suspiciously high": state(np.zeros(len(v), bool), rule("hansen_p_high"),
                                                valid=np.isfinite(hansen)),
        "instruments within units": state(rule("instruments_exceed_units"),
                                          valid=np.isfinite(inst) & np.isfinite(units)),
    }
    dh = _difference_hansen_column(v)
    if dh is not None:
        p = pd.to_numeric(v[dh], errors="coerce").to_numpy(float)
        checks["diff-in-Hansen (levels) ok"] = state(rule("difference_hansen_level_rejects"),
                                                     valid=np.isfinite(p))
    if "underid_p" in v.columns:
        # without this row a variant rejected only for underidentification showed a
        # column of green
        kp = pd.to_numeric(v["underid_p"], errors="coerce").to_numpy(float)
        checks["identified (KP), not weak (SW F)"] = state(
            rule("underidentified"), rule("weak_instruments"), valid=np.isfinite(kp))
    inside = _in_bounds(audit)
    if inside is not None:
        checks["AR coef. inside OLS-FE band"] = state(inside == 0.0, valid=np.isfinite(inside))
    out = pd.DataFrame(checks, index=v["variant"].to_numpy())
    out.index.name = "variant"
    return out


def _in_bounds(audit: AuditFolder) -> np.ndarray | None:
    """1.0 inside, 0.0 outside, NaN unknown; from the audit's ``in_bounds`` column, or
    recomputed from estimates.csv and bounds.csv for the first AR term."""
    v = audit.variants
    if "in_bounds" in v.columns:
        vals = v["in_bounds"].map(lambda s: np.nan if pd.isna(s) or str(s).strip() == "" else
                                  float(str(s).strip().lower() in ("true", "1", "1.0", "yes")))
        return vals.to_numpy(float)
    if not audit.ar_terms:
        return None
    term = audit.ar_terms[0]
    frame = audit.term_estimates(term, ok_only=False)
    lo_hi = band_arrays(audit, term, frame)
    if lo_hi is None:
        return None
    lo, hi = np.minimum(*lo_hi), np.maximum(*lo_hi)
    est = frame["estimate"].to_numpy(float)
    inside = pd.Series(((est >= lo) & (est <= hi)).astype(float), index=frame["variant"])
    return v["variant"].map(inside).to_numpy(float)


def _column_tips(audit: AuditFolder, table: pd.DataFrame) -> list[str]:
    """'variant 1a2b (base): equations system; ...; AR(2) does not reject: passes; ...'
    for each column of the matrix."""
    from ..labels import setting_name, value_text
    rows = audit.variants.set_index("variant")
    cols = [c for c in audit.setting_columns if c in rows.columns]
    out = []
    for vid, states in table.iterrows():
        r = rows.loc[vid]
        settings = "; ".join(f"{setting_name(c)} {value_text(r[c])}" for c in cols)
        checks = "; ".join(f"{name}: {STATE_NAMES.get(int(x), 'n/a') if x == x else 'n/a'}"
                           for name, x in states.items())
        base = " (base)" if vid == audit.base_variant else ""
        status = "" if r["status"] == "ok" else f"; {r['status']}: {r['reason']}"
        out.append(f"variant {vid}{base}: {settings}{status}; {checks}")
    return out


def plot_diagnostics_matrix(ax, audit: AuditFolder, *, max_tick_labels: int = MAX_TICK_LABELS):
    """Variants (columns, base first) x checks (rows); colour and legend give the state."""
    style(ax)
    ax.set_title("Diagnostics by variant", fontsize=10, loc="left")
    table = diagnostics_table(audit)
    order = [audit.base_variant] + [i for i in table.index if i != audit.base_variant]
    table = table.loc[order]
    matrix = np.ma.masked_invalid(table.to_numpy(float).T)
    cmap = ListedColormap([GREEN, YELLOW, VERMILLION, "#595959"]).with_extremes(bad=LIGHT)
    n = len(table)
    ax.imshow(matrix, aspect="auto", cmap=cmap, vmin=-0.5, vmax=3.5, interpolation="nearest")
    ax.set_yticks(np.arange(table.shape[1]))
    ax.set_yticklabels(list(table.columns), fontsize=8)
    if n <= 80:  # cell borders help only while cells are wide enough to see
        ax.set_xticks(np.arange(-0.5, n, 1), minor=True)
        ax.set_yticks(np.arange(-0.5, table.shape[1], 1), minor=True)
        ax.grid(which="minor", color="white", linewidth=0.8)
        ax.tick_params(which="minor", length=0)
    ax.spines["left"].set_visible(False)
    ax.spines["bottom"].set_visible(False)
    # one invisible rectangle over each column: in the SVG it carries a tooltip with
    # the variant id, its settings and the state of each check, so a variant a rule
    # cites can be found among hundreds of columns (the PNG is unchanged)
    rows = table.shape[1]
    columns = PolyCollection([[(i - 0.5, -0.5), (i + 0.5, -0.5), (i + 0.5, rows - 0.5),
                               (i - 0.5, rows - 0.5)] for i in range(n)],
                             facecolors=(0, 0, 0, 0), edgecolors="none", linewidths=0)
    ax.add_collection(columns, autolim=False)
    attach_tooltips(ax, columns, _column_tips(audit, table))
    variant_ticks(ax, table.index, max_tick_labels, "variants (base first)")
    handles = [Patch(facecolor=c, label=STATE_NAMES[s]) for s, c in
               ((PASS, GREEN), (WARN, YELLOW), (FAIL, VERMILLION), (NOT_ESTIMATED, "#595959"))]
    handles.append(Patch(facecolor=LIGHT, label="not applicable"))
    ax.legend(handles=handles, fontsize=7, frameon=False, loc="upper left",
              bbox_to_anchor=(0.0, -0.12 if n > max_tick_labels else -0.35), ncol=5)
    return ax

