#!/usr/bin/env python3
"""Reads one `slopecast eval --out DIR` folder and checks that its three
reports agree and that the HTML page stands alone.

  - summary.csv and report.json hold the same numbers, exactly (both are
    written as the shortest text that reads back to the same double);
  - every results table of report.html shows those numbers to 4 significant
    digits, and its ranking is report.json's;
  - report.html loads nothing from anywhere: no scripts, no stylesheets or
    fonts by reference, every src/href a data: URI or a #fragment, no url()
    in its CSS, and the embedded SVG plots (decoded) reference nothing
    outside themselves either. Parsed with Python's own html.parser.

Usage: eval_report_check.py DIR   (prints OK and exits 0, or says what differs)
"""
import base64
import csv
import json
import math
import re
import sys
from html.parser import HTMLParser


def fail(msg):
    print("FAIL:", msg)
    sys.exit(1)


def shown(v):
    return "–" if v is None or (isinstance(v, float) and not math.isfinite(v)) else "%.4g" % v


class Page(HTMLParser):
    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.problems = []
        self.tables = []  # (attrs, rows of cell texts)
        self.images = []  # data: URIs of <img>
        self.in_style = False
        self.styles = ""
        self._table = None
        self._row = None
        self._cell = None

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag in ("script", "link", "iframe", "object", "embed", "base", "frame", "audio", "video", "source"):
            self.problems.append("<%s> element" % tag)
        for name, value in attrs:
            if name in ("src", "href", "srcset", "poster", "action", "data") and value is not None:
                if not (value.startswith("data:") or value.startswith("#")):
                    self.problems.append("%s=%r on <%s>" % (name, value[:60], tag))
            if name == "style" and value and "url(" in value:
                self.problems.append("url() in a style attribute")
            if name.startswith("on"):
                self.problems.append("event handler %s" % name)
        if tag == "img":
            self.images.append(a.get("src", ""))
        if tag == "style":
            self.in_style = True
        if tag == "table":
            self._table = (a, [])
        if tag == "tr" and self._table is not None:
            self._row = []
        if tag in ("td", "th") and self._row is not None:
            self._cell = ""

    def handle_endtag(self, tag):
        if tag == "style":
            self.in_style = False
        if tag in ("td", "th") and self._cell is not None:
            self._row.append(self._cell.strip())
            self._cell = None
        if tag == "tr" and self._row is not None:
            self._table[1].append(self._row)
            self._row = None
        if tag == "table" and self._table is not None:
            self.tables.append(self._table)
            self._table = None

    def handle_data(self, data):
        if self.in_style:
            self.styles += data
        if self._cell is not None:
            self._cell += data


def main(folder):
    with open(folder + "/report.json") as f:
        report = json.load(f)
    with open(folder + "/summary.csv", newline="") as f:
        rows = list(csv.DictReader(f))
    figures = [k for k in rows[0].keys() if k not in ("point", "candidate", "options", "partial", "photons",
                                                     "read_noise_e", "cog_theory_px", "cramer_rao_px")]
    # CSV <-> JSON, exactly.
    count = 0
    for row in rows:
        point = next(p for p in report["points"] if p["label"] == row["point"])
        res = next(r for r in point["results"] if r["candidate"] == row["candidate"])
        for k in figures:
            j = res[k]
            c = float(row[k]) if row[k] != "" else None
            if (j is None) != (c is None) or (j is not None and float(j) != c):
                fail("%s / %s / %s: CSV %r, JSON %r" % (row["point"], row["candidate"], k, row[k], j))
            count += 1
        for k in ("cog_theory_px", "cramer_rao_px"):
            c = float(row[k]) if row[k] != "" else None
            if (point[k] is None) != (c is None) or (c is not None and c != float(point[k])):
                fail("%s: %s differs between CSV and JSON" % (row["point"], k))
        if int(row["partial"]) != int(report["partial"]):
            fail("partial flag differs")
    if count == 0:
        fail("no numbers compared")

    # HTML.
    with open(folder + "/report.html", encoding="utf-8") as f:
        text = f.read()
    page = Page()
    page.feed(text)
    if "url(" in page.styles or "@import" in page.styles:
        page.problems.append("url() or @import in <style>")
    for src in page.images:
        if not src.startswith("data:image/svg+xml;base64,"):
            page.problems.append("an image that is not an embedded SVG")
            continue
        svg = base64.b64decode(src.split(",", 1)[1]).decode("utf-8")
        if "<script" in svg:
            page.problems.append("a script inside an SVG plot")
        for ref in re.findall(r"""(?:xlink:)?href\s*=\s*['"]([^'"]*)['"]""", svg):
            if not (ref.startswith("#") or ref.startswith("data:")):
                page.problems.append("an SVG plot refers to %r" % ref[:60])
    if page.problems:
        fail("report.html is not self-contained: " + "; ".join(sorted(set(page.problems))))
    if not page.images:
        fail("report.html has no plots")

    ranking = next((t for t in page.tables if t[0].get("id") == "ranking"), None)
    if ranking is None:
        fail("no ranking table")
    html_order = [r[1] for r in ranking[1][1:]]
    json_order = [r["candidate"] for r in report["ranking"]]
    if html_order != json_order:
        fail("ranking differs: HTML %s, JSON %s" % (html_order, json_order))
    for r, rank in zip(ranking[1][1:], report["ranking"]):
        if r[2] != shown(rank["figure"]):
            fail("ranking figure of %s: HTML %s, JSON %s" % (r[1], r[2], rank["figure"]))
    tables = [t for t in page.tables if t[0].get("class") == "results"]
    if len(tables) != len(report["points"]):
        fail("%d results tables for %d points" % (len(tables), len(report["points"])))
    cells = 0
    for attrs, trs in tables:
        point = next(p for p in report["points"] if p["label"] == attrs.get("data-point"))
        head = trs[0]
        for tr in trs[1:]:
            res = next(r for r in point["results"] if r["candidate"] == tr[0])
            for name, cell in zip(head[1:], tr[1:]):
                if cell != shown(res[name]):
                    fail("%s / %s / %s: HTML %s, JSON %r" % (point["label"], tr[0], name, cell, res[name]))
                cells += 1
    if report["partial"] and 'id="partial"' not in text:
        fail("a partial report that does not say so")
    print("OK: %d CSV/JSON numbers, %d HTML cells, %d plots, %d bytes of HTML" % (count, cells, len(page.images), len(text)))


if __name__ == "__main__":
    main(sys.argv[1])
