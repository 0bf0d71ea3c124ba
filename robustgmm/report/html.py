"""report.html: one self-contained file (styles, script and figures inline).

Figures are embedded as base64 PNG ``data:`` URIs, so the file opens offline and
can be mailed as it is; there are no external references of any kind. All user
text (column names, term labels, file names, reasons) goes through jinja2's
autoescape.
"""
from __future__ import annotations

from functools import lru_cache

from jinja2 import Environment, PackageLoader, StrictUndefined


@lru_cache(maxsize=1)
def environment() -> Environment:
    # autoescape=True for every template: everything rendered here is HTML.
    return Environment(loader=PackageLoader("robustgmm", "templates"), autoescape=True,
                       undefined=StrictUndefined, trim_blocks=True, lstrip_blocks=True,
                       keep_trailing_newline=True)


def render_html(context: dict) -> str:
    """The report as an HTML string from :func:`robustgmm.report.context.build_context`."""
    return environment().get_template("report.html.j2").render(**context)
