"""The report reads in a referee's order and every cited variant can be found.

report.html and report.md of a real audit folder (tests/report_fixture.py, "main":
64 variants, some rejected by their tests, so model-level rules cite variant ids):

- the full base-model table comes right after the verdicts, the what-drives-it
  tables after it and before the figures (they once sat inside the narrow verdict
  cards, where they scrolled sideways), provenance last;
- every link to a variant goes to a row of the variants table, and each variant id
  a fired rule cites in its figures is such a link;
- report.md has the same order and the base model's every term.
"""
from __future__ import annotations

import re
from html.parser import HTMLParser

from robustgmm.report import read_audit_folder
from robustgmm.report.context import build_context, link_ids
from robustgmm.report.html import render_html
from robustgmm.report.markdown import render_markdown
from robustgmm.report.sections import anchor


class _Tree(HTMLParser):
    """Section ids in order, the ids of elements, hrefs, and drivers tables found
    inside a verdict card."""

    def __init__(self):
        super().__init__()
        self.sections, self.ids, self.hrefs = [], set(), []
        self.stack, self.drivers_in_cards, self.drivers = [], 0, 0

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        classes = (a.get("class") or "").split()
        if tag == "section":
            self.sections.append(a.get("id"))
        if a.get("id"):
            self.ids.add(a["id"])
        if tag == "a" and (a.get("href") or "").startswith("#"):
            self.hrefs.append(a["href"][1:])
        if tag == "table" and "drivers" in classes:
            self.drivers += 1
            self.drivers_in_cards += any("card" in c for c in self.stack)
        if tag not in ("br", "img", "meta", "col", "input"):
            self.stack.append(classes)

    def handle_endtag(self, tag):
        if tag not in ("br", "img", "meta", "col", "input") and self.stack:
            self.stack.pop()


def _html(folder):
    audit = read_audit_folder(folder)
    ctx = build_context(audit, [])
    tree = _Tree()
    tree.feed(render_html(ctx))
    return audit, ctx, tree


def test_sections_in_a_referee_order_and_drivers_outside_the_cards(audit_folder):
    audit, ctx, tree = _html(audit_folder("main"))
    s = tree.sections
    assert s[:4] == ["verdicts", "base-model", "drivers", "referee"], s
    assert s.index("drivers") < s.index("figures") < s.index("variants")
    assert s[-1] == "provenance"
    with_drivers = [t for t in ctx["terms"] if t["drivers"]]
    assert with_drivers and tree.drivers == len(with_drivers)
    assert tree.drivers_in_cards == 0


def test_every_variant_link_has_a_row_and_rule_ids_are_links(audit_folder):
    audit, ctx, tree = _html(audit_folder("main"))
    rows = {anchor(v) for v in audit.variants["variant"]}
    targets = [h for h in tree.hrefs if h.startswith("variant-")]
    assert targets and set(targets) <= rows <= tree.ids
    cited = set()
    for rule in [r for t in ctx["terms"] for r in t["rules"]] + ctx["flags"]:
        for vid in audit.variants["variant"]:
            if re.search(rf"\b{re.escape(str(vid))}\b", rule["figures"]):
                cited.add(anchor(vid))
    assert cited, "no rule of this audit cites a variant id"
    assert cited <= set(targets)


def test_link_ids_splits_only_whole_ids():
    parts = link_ids("variant = ab12; ids = ab123, cd34", ["ab12", "cd34", "ab123"])
    assert parts == [("variant = ", ""), ("ab12", "variant-ab12"), ("; ids = ", ""),
                     ("ab123", "variant-ab123"), (", ", ""), ("cd34", "variant-cd34")]


def test_markdown_follows_the_same_order_with_the_whole_base_model(audit_folder):
    audit = read_audit_folder(audit_folder("main"))
    md = render_markdown(build_context(audit, []))
    heads = [line for line in md.splitlines() if line.startswith("## ")]
    names = [h.split(" (")[0] for h in heads]
    assert names[:4] == ["## Verdict per focus term", "## Base model",
                         "## What drives each estimate", "## Paragraphs for a referee response"]
    assert names[-1] == "## Provenance"
    base = audit.estimates[audit.estimates["variant"] == audit.base_variant]
    section = md.split("## Base model")[1].split("\n## ")[0]
    for term in base["term"]:
        assert re.search(r"^\| `" + re.escape(term) + "`", section, re.M), term
    assert "Hansen J, robust weight" in section and "| units |" in section
