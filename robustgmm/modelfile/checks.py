"""Value checks shared by the model-file reader and the :class:`~robustgmm.spec.Spec`
constructor, so that a bad value gets the same one-line message from either.

Each ``v_*`` check returns the parsed value or raises :class:`Bad` with a message
that completes ``"<key> = <value>: ..."``; :func:`fmt` renders the value the way it
is written in TOML. The choice checks take their words from the vocabulary enums of
:mod:`robustgmm.options`.
"""
from __future__ import annotations

import difflib
import enum
import json
import math
import numbers
from typing import Any, Callable

from .. import options


class Bad(Exception):
    """A value failed its check; the message completes "<key> = <value>: ..."."""


MISSING = object()


# ---------------------------------------------------------------------------
# value formatting and suggestions
# ---------------------------------------------------------------------------
def fmt(value: Any, limit: int = 60) -> str:
    """Render a value the way it would be written in TOML (for messages)."""
    if isinstance(value, bool):
        text = "true" if value else "false"
    elif isinstance(value, str):
        text = json.dumps(value, ensure_ascii=False)
    elif isinstance(value, (list, tuple)):
        text = "[" + ", ".join(fmt(v, limit) for v in value) + "]"
    elif isinstance(value, dict):
        text = "{" + ", ".join(f"{key_text(k)} = {fmt(v, limit)}" for k, v in value.items()) + "}"
    elif isinstance(value, float):
        text = repr(value)
    else:
        text = str(value)
        if not text.isprintable():
            text = json.dumps(text)
    return text if len(text) <= limit else text[: limit - 3] + "..."


def key_text(key: Any) -> str:
    """A key or name as shown in a message: bare when plain, else quoted and escaped
    (so that a name holding a newline never splits a message line)."""
    text = str(key)
    if text and all(c.isprintable() for c in text) and not text.startswith(" ") \
            and not text.endswith(" "):
        return text
    return json.dumps(text)


def closest(word: Any, choices) -> str | None:
    if not isinstance(word, str):
        return None
    choices = [str(o) for o in choices]
    lower = {o.lower(): o for o in choices}
    if word.lower() in lower:
        return lower[word.lower()]
    match = difflib.get_close_matches(word, choices, n=1, cutoff=0.6)
    if not match:
        match = difflib.get_close_matches(word.lower(), list(lower), n=1, cutoff=0.6)
        match = [lower[m] for m in match]
    return match[0] if match else None


def one_of(choices) -> str:
    shown = [fmt(o) for o in choices]
    if len(shown) == 1:
        return shown[0]
    return ", ".join(shown[:-1]) + " or " + shown[-1]


# ---------------------------------------------------------------------------
# scalar validators: return the parsed value or raise Bad(message)
# ---------------------------------------------------------------------------
def is_int(v) -> bool:
    return isinstance(v, numbers.Integral) and not isinstance(v, bool)


def is_num(v) -> bool:
    return isinstance(v, numbers.Real) and not isinstance(v, bool)


def v_name(v):
    if not isinstance(v, str):
        raise Bad("must be a text value (a column name in quotes)")
    if not v.strip():
        raise Bad("must not be empty")
    if v != v.strip():
        raise Bad("has leading or trailing spaces")
    if not all(c.isprintable() for c in v):
        raise Bad("holds a control character (e.g. a line break)")
    return v


def v_labels(v):
    """``[labels]``: term label -> display text (both non-empty one-line texts);
    returned as a tuple of pairs in file order. A dict or such pairs are accepted."""
    items = list(v.items()) if isinstance(v, dict) else v
    if not isinstance(items, (list, tuple)) or not all(
            isinstance(p, (list, tuple)) and len(p) == 2 for p in items):
        raise Bad('must be a table of term = "label" pairs, e.g. "x[t]" = "Leverage"')
    out = []
    for term, text in items:
        if not isinstance(term, str) or not term.strip():
            raise Bad("has an empty term name")
        if not isinstance(text, str) or not text.strip():
            raise Bad(f"{term!r} must be a non-empty text in quotes")
        if not all(ch.isprintable() for ch in text):
            raise Bad(f"{term!r} holds a control character (e.g. a line break)")
        out.append((term, text))
    return tuple(out)


def v_bool(v):
    if not isinstance(v, bool):
        raise Bad("must be true or false")
    return v


def v_choice(kind: type[enum.Enum]) -> Callable:
    """A check that accepts the words of one vocabulary enum (:mod:`robustgmm.options`)
    and returns the word (a member given directly is accepted as its word)."""
    words = tuple(m.value for m in kind)

    def check(v):
        try:
            return options.parse(kind, v).value
        except ValueError:
            pass
        hint = closest(v, words) if isinstance(v, str) else None
        msg = f"must be {one_of(words)}"
        if hint is not None:
            msg += f" (did you mean {fmt(hint)}?)"
        raise Bad(msg)
    return check


v_equations = v_choice(options.Equations)
v_transform = v_choice(options.Transform)
v_errors = v_choice(options.Errors)
v_form = v_choice(options.Form)
v_role = v_choice(options.Role)
v_influence = v_choice(options.InfluenceScope)


def v_steps(v):
    if isinstance(v, options.Steps):
        return v.value
    if is_int(v) and int(v) in (1, 2):
        return int(v)
    if v == "iterated":
        return v
    hint = ""
    if isinstance(v, str):
        if v.strip() in ("1", "2"):
            hint = f" (write {v.strip()} without quotes)"
        else:
            close = closest(v, ["iterated"])
            hint = ' (did you mean "iterated"?)' if close else ""
    raise Bad(f'must be 1, 2 or "iterated"{hint}')


def v_first_lag(v):
    if not is_int(v):
        raise Bad("must be a whole number (1 or more)")
    if v < 1:
        raise Bad("must be 1 or more (lag 0 is the current period, which is not a valid instrument)")
    return int(v)


def v_last_lag(v):
    if v == "all":
        return None
    if isinstance(v, str):
        hint = ' (did you mean "all"?)' if closest(v, ["all"]) else ""
        raise Bad(f'must be a whole number or "all"{hint}')
    if not is_int(v):
        raise Bad('must be a whole number or "all"')
    if v < 1:
        raise Bad('must be 1 or more, or "all"')
    return int(v)


def v_max_drop_share(v):
    """``[audit] max_drop_share``: the largest share of units a dropping search may
    remove, strictly between 0 and 1 (0.5 would already be half the sample)."""
    if isinstance(v, bool) or not isinstance(v, numbers.Real) or not math.isfinite(v):
        raise Bad("must be a number in (0, 1), e.g. 0.05 (the largest share of units the "
                  "dropping search may remove)")
    if not 0 < v < 1:
        raise Bad("must be above 0 and below 1, e.g. 0.05")
    return float(v)


def v_max_variants(v):
    if not is_int(v):
        raise Bad("must be a whole number (1 or more): the most variants the audit may run")
    if v < 1:
        raise Bad("must be 1 or more")
    return int(v)


def v_period(v):
    if not is_int(v):
        raise Bad("must be a whole number (a period of the data)")
    return int(v)


def _v_number(inside: Callable[[float], bool], what: str, where: str) -> Callable:
    """A check for a finite number: ``what`` says the kind of number wanted when the
    value is not one, ``where`` the range when it falls outside ``inside``."""
    def check(v):
        if not is_num(v) or not math.isfinite(v):
            raise Bad(f"must be {what}")
        if not inside(v):
            raise Bad(f"must be {where}")
        return float(v)
    return check


v_prob = _v_number(lambda v: 0 < v < 1, "a number strictly between 0 and 1",
                   "strictly between 0 and 1")
v_share = _v_number(lambda v: 0 < v <= 1, "a number in (0, 1]", "above 0 and at most 1")
v_positive = _v_number(lambda v: v > 0, "a positive number", "above 0")


def v_lags(minimum: int, what: str) -> Callable:
    def check(v):
        if not isinstance(v, list):
            raise Bad(f"must be a list of whole numbers, e.g. [{minimum}]")
        if not v:
            raise Bad(f"must list at least one lag ({what})")
        out = []
        for item in v:
            if not is_int(item):
                raise Bad(f"{fmt(item)} is not a whole number")
            if item < 0:
                raise Bad(f"{item} is negative: lags count periods back and start at {minimum}")
            if item < minimum:
                raise Bad(f"{item} is below {minimum} ({what})")
            if int(item) in out:
                raise Bad(f"lag {item} is listed twice")
            out.append(int(item))
        return tuple(out)
    return check


def _names(v, what: str, example: str) -> tuple:
    """A list of distinct non-blank names (``what``: "column name", ...)."""
    if not isinstance(v, list):
        raise Bad(f"must be a list of {what}s, e.g. {example}")
    out = []
    for item in v:
        if not isinstance(item, str) or not item.strip():
            raise Bad(f"{fmt(item)} is not a {what}")
        if item in out:
            raise Bad(f"{fmt(item)} is listed twice")
        out.append(item)
    return tuple(out)


def v_name_list(v):
    return _names(v, "column name", '["z"]')


def v_window(v):
    """An instrument lag window ``[first, last]``: whole numbers, ``last`` at least
    ``first`` or ``"all"``; returned as ``(first, last)`` with ``None`` for "all"."""
    if isinstance(v, tuple):
        v = ["all" if x is None else x for x in v]
    if not isinstance(v, list) or len(v) != 2:
        raise Bad('must be a window [first, last], e.g. [2, 4] or [2, "all"]')
    first, last = v
    if not is_int(first) or first < 1:
        raise Bad("the first lag must be a whole number, 1 or more")
    if last == "all":
        return (int(first), None)
    if not is_int(last) or last < first:
        raise Bad(f'the last lag must be a whole number of at least {first}, or "all"')
    return (int(first), int(last))


def window_text(window) -> str:
    """A window as the model file writes it: ``[2, 4]``, ``[2, "all"]``."""
    first, last = window
    return fmt([first, "all" if last is None else last])


def v_min_units(v):
    if not is_int(v) or v < 1:
        raise Bad("must be a whole number of units, 1 or more")
    return int(v)


def v_drop_list(v):
    """A set of regressors to leave out (``[]`` leaves none out)."""
    return _names(v, "regressor name", '["married"] (or [] for none)')


def v_scalar_list(v):
    if not isinstance(v, list):
        raise Bad("must be a list of values, e.g. [7, 9] or [\"UK\"]")
    if not v:
        raise Bad("must list at least one value")
    out = []
    for item in v:
        if isinstance(item, bool) or not isinstance(item, (str, numbers.Real)):
            raise Bad(f"{fmt(item)} is not a text or number value")
        if isinstance(item, float) and not math.isfinite(item):
            raise Bad(f"{fmt(item)} is not a finite number")
        if item in out:
            raise Bad(f"{fmt(item)} is listed twice")
        out.append(item)
    return tuple(out)


def threshold_check(name: str) -> Callable:
    if name == "count_untestable":
        return v_bool
    if name.endswith("share") or name == "min_coverage":
        return v_share
    if name.endswith(("reject", "high")):
        return v_prob
    return v_positive
