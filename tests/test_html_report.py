"""The client's HTML report: self-contained, complete, faithful to report.json, escaped, accessible.

Reports come from real analyses (samesource.pipeline.analyze) of simulated surveys with
known structure (sample_surveys/simulate.py) and of the bundled sample survey; the page is parsed
with the standard library (html.parser; xml.etree for each SVG figure).
"""

from __future__ import annotations

import copy
import html
import json
import re
import xml.etree.ElementTree as ET
from html.parser import HTMLParser
from pathlib import Path

import pytest
from report_fields import with_new_fields

from samesource.executor import SerialExecutor
from samesource.output import svg
from samesource.output.brief import render_brief
from samesource.output.report_html import render_html
from samesource.output.tables import method_label
from samesource.pipeline import analyze
from simulate import ConstructSpec, SurveySpec, design_for, simulate_survey

ROOT = Path(__file__).resolve().parents[1]
MINUS = "\u2212"
HOSTILE = '<script>alert("x")</script>'
HOSTILE_2 = 'eng & "co" <b>'
HOSTILE_ITEM = "<img src=x onerror=alert(1)>"


# --------------------------------------------------------------------------- reports

def _survey(*, marker: bool = True, measured: bool = False, paths: bool = True, teams: int = 0,
            seed: int = 3) -> SurveySpec:
    # every item .70 trait + .35 method: a method share of .1225 of item variance (known truth)
    cons = [ConstructSpec("sup", 4, 0.7, 0.35), ConstructSpec("eng", 4, 0.7, 0.35, reverse=[2]),
            ConstructSpec("stay", 3, 0.7, 0.35, prefix="sty")]
    if marker:
        cons.append(ConstructSpec("wth", 3, 0.7, 0.35, role="marker"))
    if measured:
        cons.append(ConstructSpec("imp", 4, 0.65, role="method"))
    return SurveySpec(constructs=cons, paths={"eng": {"sup": 0.3}, "stay": {"eng": 0.45}} if paths else {},
                      n=300, scale_points=5, seed=seed, n_teams=teams)


def _run(spec: SurveySpec, options: dict | None = None, *, rename: dict | None = None,
         rename_items: dict | None = None, **kw) -> dict:
    df, _ = simulate_survey(spec)
    design = design_for(spec)
    if rename_items:
        df = df.rename(columns=rename_items)
        for c in design["constructs"].values():
            c["items"] = [rename_items.get(i, i) for i in c["items"]]
            if "reverse" in c:
                c["reverse"] = [rename_items.get(i, i) for i in c["reverse"]]
    if rename:
        design["constructs"] = {rename.get(k, k): v for k, v in design["constructs"].items()}
        design["paths"] = [{"outcome": rename.get(p["outcome"], p["outcome"]),
                            "predictors": [rename.get(x, x) for x in p["predictors"]]} for p in design["paths"]]
    return analyze(df.to_csv(index=False).encode(), design, options, name="survey.csv", **kw).report


@pytest.fixture(scope="module")
def sample() -> dict:
    design = json.loads((ROOT / "sample_surveys" / "staff_survey_design.json").read_text())
    return analyze(ROOT / "sample_surveys" / "staff_survey.csv", design).report


@pytest.fixture(scope="module")
def full() -> dict:
    return _run(_survey(measured=True))


@pytest.fixture(scope="module")
def hostile() -> dict:
    # no marker and no method construct, and names an attacker might choose
    return _run(_survey(marker=False), rename={"sup": HOSTILE, "eng": HOSTILE_2},
                rename_items={"sup1": HOSTILE_ITEM})


@pytest.fixture(scope="module")
def no_paths() -> dict:
    return _run(_survey(paths=False))


@pytest.fixture(scope="module")
def boot_teams() -> dict:
    return _run(_survey(teams=30), {"bootstrap": 20, "seed": 1}, executor=SerialExecutor())


@pytest.fixture(scope="module")
def reports(sample, full, hostile, no_paths, boot_teams) -> dict[str, dict]:
    return {"sample": sample, "full": full, "hostile": hostile, "no_paths": no_paths, "boot_teams": boot_teams}


# --------------------------------------------------------------------------- parsing the page

VOID = {"meta", "br", "hr", "img", "input", "link", "area", "base", "col", "embed", "source", "track", "wbr"}


class Page(HTMLParser):
    """Collects tags (checking they balance), text, headings, ids and tables (caption, cells)."""

    def __init__(self, markup: str) -> None:
        super().__init__(convert_charrefs=True)
        self.stack: list[str] = []
        self.errors: list[str] = []
        self.tags: list[tuple[str, dict]] = []
        self.texts: list[str] = []
        self.css = ""
        self.headings: list[tuple[int, str]] = []
        self.tables: list[dict] = []
        self._heading: list | None = None
        self._cell: str | None = None
        self._caption: str | None = None
        self._style = False
        self.feed(markup)
        self.close()

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))
        if tag not in VOID:
            self.stack.append(tag)
        if tag == "style":
            self._style = True
        if re.fullmatch(r"h[1-6]", tag):
            self._heading = [int(tag[1]), ""]
        if tag == "table":
            self.tables.append({"caption": "", "rows": [], "th_scopes": []})
        if tag == "caption":
            self._caption = ""
        if tag == "tr" and self.tables:
            self.tables[-1]["rows"].append([])
        if tag in ("td", "th"):
            self._cell = ""
            if tag == "th":
                self.tables[-1]["th_scopes"].append(dict(attrs).get("scope"))

    def handle_startendtag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))

    def handle_endtag(self, tag):
        if tag in VOID:
            return
        if not self.stack or self.stack[-1] != tag:
            self.errors.append(f"</{tag}> closes <{self.stack[-1] if self.stack else '(nothing)'}>")
            if tag in self.stack:
                while self.stack.pop() != tag:
                    pass
            return
        self.stack.pop()
        if tag == "style":
            self._style = False
        if self._heading and tag == f"h{self._heading[0]}":
            self.headings.append((self._heading[0], self._heading[1].strip()))
            self._heading = None
        if tag == "caption" and self._caption is not None:
            self.tables[-1]["caption"] = self._caption.strip()
            self._caption = None
        if tag in ("td", "th") and self._cell is not None:
            self.tables[-1]["rows"][-1].append(" ".join(self._cell.split()))
            self._cell = None

    def handle_data(self, data):
        if self._style:
            self.css += data
            return
        self.texts.append(data)
        if self._heading is not None:
            self._heading[1] += data
        if self._cell is not None:
            self._cell += data
        if self._caption is not None:
            self._caption += data

    def ids(self) -> list[str]:
        return [a["id"] for _, a in self.tags if "id" in a]

    def table(self, caption_start: str) -> list[list[str]]:
        found = [t for t in self.tables if t["caption"].startswith(caption_start)]
        assert found, f"no table captioned {caption_start!r}"
        return found[0]["rows"]

    def row(self, caption_start: str, first_cell: str) -> list[str]:
        rows = [r for r in self.table(caption_start) if r and r[0] == first_cell]
        assert rows, f"no row {first_cell!r} in {caption_start!r}"
        return rows[0]


def svgs(markup: str) -> list[ET.Element]:
    return [ET.fromstring(m) for m in re.findall(r"<svg\b.*?</svg>", markup, flags=re.S)]


def decision_blocks(markup: str) -> list[str]:
    """The plain text of each decision card on the first screen (its numbers line ends it)."""
    return [plain(b) for b in re.findall(r'<div class="answer-path decision"[^>]*>(.*?<p class="sub numbers">.*?</p>)',
                                         markup, flags=re.S)]


def plain(fragment: str) -> str:
    return " ".join(html.unescape(re.sub(r"<[^>]+>", " ", fragment)).split())


def fmt(v: float, d: int = 3) -> str:
    """The page's number format, written out independently: d decimals, a true minus sign."""
    s = f"{v:.{d}f}"
    if float(s) == 0:
        s = s.lstrip("-")
    return s.replace("-", MINUS)


def interval(ci: list[float], d: int = 3) -> str:
    return f"[{fmt(ci[0], d)}, {fmt(ci[1], d)}]"


def pct(v: float) -> str:
    return fmt(v * 100, 1) + "%"


# --------------------------------------------------------------------------- structure

SECTIONS = ["answer", "cautions", "paths", "sensitivity", "reliability", "loadings", "method-variance", "fit",
            "data", "cautions-again"]


@pytest.mark.parametrize("name", ["sample", "boot_teams"])
def test_the_table_of_contents_is_the_section_registry(reports, name):
    from samesource.output.sections import SECTIONS as REGISTRY
    from samesource.output.tables import report_tables

    report = reports[name]
    page = Page(render_html(report))
    toc = re.search(r'<nav class="toc".*?</nav>', render_html(report), re.S).group(0)
    listed = re.findall(r'<li><a href="#([^"]+)">', toc)
    shown = [s.id for s in REGISTRY if s.id in page.ids()]
    assert listed == shown and set(SECTIONS) - {"answer", "cautions"} <= set(listed)
    # every table the tables module writes belongs to exactly one section
    owners = [t for s in REGISTRY for t in s.tables]
    assert len(owners) == len(set(owners))
    assert set(report_tables(report)) <= set(owners)
    assert len({s.id for s in REGISTRY}) == len(REGISTRY)


@pytest.mark.parametrize("name", ["sample", "full", "hostile", "no_paths", "boot_teams"])
def test_page_parses_and_holds_every_section(reports, name):
    report = reports[name]
    markup = render_html(report)
    page = Page(markup)
    assert page.errors == [] and page.stack == []  # every element we open is closed, in order
    assert markup.startswith("<!doctype html>")
    ids = page.ids()
    assert len(ids) == len(set(ids))  # ids are unique
    for sec in SECTIONS:
        assert sec in ids, sec
    assert ("teams" in ids) == isinstance(report.get("teams"), dict)
    n_paths = len(report["paths"] or [])
    assert sum(i.startswith("forest-") and not i.endswith(("-svg", "-title", "-desc")) for i in ids) == n_paths
    assert sum(re.fullmatch(r"sensitivity-\d+", i) is not None for i in ids) == n_paths
    assert "loadings-figure" in ids
    # every SVG figure is well-formed XML (the scale cards replaced the four reliability panels)
    assert len(svgs(markup)) == 2 * n_paths + 1  # forest + sensitivity per path, heat map


def test_headings_in_order_and_landmarks(sample):
    page = Page(render_html(sample))
    levels = [lv for lv, _ in page.headings]
    assert levels[0] == 1 and levels.count(1) == 1
    assert all(b <= a + 1 for a, b in zip(levels, levels[1:], strict=False))  # never skips a level
    tags = page.tags
    assert ("html", {"lang": "en"}) in tags
    assert any(t == "main" and a.get("id") == "main" for t, a in tags)
    skip = [a for t, a in tags if t == "a" and "skip" in (a.get("class") or "")]
    assert skip and skip[0]["href"] == "#main"
    assert any(t == "meta" and a.get("name") == "viewport" for t, a in tags)


@pytest.mark.parametrize("name", ["sample", "hostile", "boot_teams"])
def test_nothing_is_loaded_from_elsewhere(reports, name):
    markup = render_html(reports[name])
    page = Page(markup)
    for tag, attrs in page.tags:
        assert tag not in ("script", "link", "img", "iframe", "object", "embed", "base"), tag
        for key in ("src", "href", "xlink:href", "action", "srcset", "poster", "data"):
            v = attrs.get(key)
            if v is None:
                continue
            # links within the page, the chart downloads carried in the page itself (data: links
            # with a download name), and the files written beside report.html (followed only
            # when clicked: nothing is fetched to show the page)
            if v.startswith("data:"):
                assert tag == "a" and attrs.get("download"), (tag, key, v[:40])
                assert v.startswith(("data:image/svg+xml;base64,", "data:image/png;base64,")), v[:40]
            else:
                assert v.startswith("#") or v in SIBLINGS, (tag, key, v)
    assert "http://" not in markup and "https://" not in markup
    assert "@import" not in page.css and not re.search(r"url\(", page.css)


SIBLINGS = {"tables.xlsx", "brief.html", "report.html"}


# Words that would mean a missing value leaked into the page. "None of ..." is English (a fit
# warning reads "None of the 4 starting points gave a proper solution") and is allowed.
LEAK = re.compile(r"\b(NaN|nan|None|null|undefined|inf|Infinity|-inf)\b(?! of\b)")


def _leaks(markup: str) -> list[str]:
    page = Page(markup)
    # attribute values too, except the chart downloads (base64 data: links, whose letters may spell anything)
    chunks = page.texts + [v for _, a in page.tags for v in a.values() if v and not v.startswith("data:")]
    return [m.group(0) for c in chunks for m in LEAK.finditer(c)]


@pytest.mark.parametrize("name", ["sample", "full", "hostile", "no_paths", "boot_teams"])
def test_no_missing_value_words(reports, name):
    assert _leaks(render_html(reports[name])) == []


def test_every_number_missing_still_renders(sample):
    # Every float in the report set to null (what report.json holds where a value could not be
    # computed): the page still renders, balanced, with dashes instead of missing-value words.
    def blank(o):
        if isinstance(o, dict):
            return {k: blank(v) for k, v in o.items()}
        if isinstance(o, list):
            return [blank(v) for v in o]
        return None if isinstance(o, float) else o

    markup = render_html(blank(sample))
    page = Page(markup)
    assert page.errors == []
    assert _leaks(markup) == []
    for svg_el in svgs(markup):
        assert svg_el.get("role") == "img"


@pytest.mark.parametrize("drop", ["screening", "constructs", "measurement_model", "method_variance", "paths",
                                  "thresholds", "options", "data", "teams", "cautions", "warnings"])
def test_any_section_may_be_absent(sample, drop):
    for value in (None, "absent"):
        r = copy.deepcopy(sample)
        if value == "absent":
            r.pop(drop, None)
        else:
            r[drop] = None
        markup = render_html(r)
        page = Page(markup)
        assert page.errors == [] and _leaks(markup) == []
        assert "cautions" in page.ids()


# --------------------------------------------------------------------------- faithful numbers

@pytest.mark.parametrize("name", ["sample", "full", "boot_teams"])
def test_path_numbers_equal_the_report(reports, name):
    report = reports[name]
    markup = render_html(report)
    page = Page(markup)
    blocks = decision_blocks(markup)
    assert len(blocks) == len(report["paths"])
    for p, block in zip(report["paths"], blocks, strict=True):
        pref = p["estimates"][p["preferred"]]
        obs = p["estimates"]["observed"]
        title = f"{p['predictor']} \u2192 {p['outcome']}"
        assert block.startswith(title)
        assert f"Best estimate: {fmt(pref['estimate'])} {interval(pref['ci'])}" in block
        # the sentence rounds the same two numbers to two decimals
        assert f"about {fmt(pref['estimate'], 2)} on a {MINUS}1 to 1 scale" in block
        assert f"the raw survey number, {fmt(obs['estimate'], 2)}," in block
        # the estimates table: every available estimate with its interval, SE and p
        caption = f"Estimates of {title}"
        for m, e in p["estimates"].items():
            row = [r for r in page.table(caption) if r and r[0].startswith(method_label(m))]
            assert len(row) == 1, m
            if e is None or e["estimate"] is None:
                assert row[0][1].startswith("not available: ")
                continue
            assert row[0][1:4] == [fmt(e["estimate"]), interval(e["ci"]), fmt(e["se"])]
        pref_rows = [r for r in page.table(caption) if "preferred" in r[0]]
        assert len(pref_rows) == 1 and pref_rows[0][1] == fmt(pref["estimate"])
        # the forest plot prints the same numbers
        forest = [s for s in svgs(markup) if s.findtext("title") == f"Every estimate of {title}"]
        texts = ["".join(t.itertext()) for t in forest[0].iter("text")]
        assert f"{fmt(pref['estimate'])} {interval(pref['ci'])}" in texts


def test_bootstrap_intervals_shown(boot_teams):
    page = Page(render_html(boot_teams))
    p = boot_teams["paths"][0]
    caption = f"Estimates of {p['predictor']} \u2192 {p['outcome']}"
    for m, e in p["estimates"].items():
        if e is None or e["estimate"] is None:
            continue
        row = [r for r in page.table(caption) if r and r[0].startswith(method_label(m))][0]
        b = e["bootstrap"]
        assert row[5] == {"bca": "bootstrap BCa", "percentile": "bootstrap percentile"}[e["ci_method"]]
        assert row[6] == interval(b["ci_percentile"])
        assert row[7] == (interval(b["ci_bca"]) if b["ci_bca"] else "\u2014")


def test_reliability_fit_and_method_numbers_equal_the_report(sample):
    markup = render_html(sample)
    page = Page(markup)
    cards = dict(re.findall(r'<div class="card[^"]*" data-scale="([^"]+)">(.*?)</div>', markup, flags=re.S))
    assert list(cards) == list(sample["constructs"])
    for name, c in sample["constructs"].items():
        card = plain(cards[name])
        assert f"alpha {fmt(c['alpha'])} {interval(c['alpha_ci'])}" in card
        assert f"omega {fmt(c['omega'])}" in card and f"CR {fmt(c['composite_reliability'])}" in card
        assert f"AVE {fmt(c['ave'])}" in card
        for item, st in c["item_stats"].items():
            irow = page.row("Item statistics", item)
            assert irow[3].startswith(fmt(st["loading"])) and irow[4] == fmt(st["item_rest_r"])
    # AVE of the method scale is below .50 in the sample survey: marked by a cross, not colour alone
    assert sample["constructs"]["impression"]["ave"] < 0.5
    assert re.search(f"AVE {re.escape(fmt(sample['constructs']['impression']['ave']))} \\(\u2265 0.50\\) \u2717",
                     plain(cards["impression"]))
    fit = sample["measurement_model"]["fit"]
    assert page.row("Fit of the measurement model", "CFI")[1] == fmt(fit["cfi"])
    rmsea = page.row("Fit of the measurement model", "RMSEA")[1]
    assert rmsea.startswith(fmt(fit["rmsea"])) and interval(fit["rmsea_ci"]) in rmsea
    assert page.row("Fit of the measurement model", "SRMR")[1] == fmt(fit["srmr"])
    mv = sample["method_variance"]
    assert f"Common-method variance: {mv['verdict']['level'].upper()}" in [t for _, t in page.headings]
    mf_row = page.row("Every signal the verdict weighed", "Latent method factor")
    reason = next(r for r in mv["verdict"]["reasons"] if re.match(r"\[\w+\] method factor", r))
    assert pct(mv["method_factor"]["method_share"]) in mf_row[2]
    assert mf_row[5].endswith(reason[1:reason.index("]")])
    # discriminant validity: every pair, ranked from the closest to overlapping, with its HTMT
    ranked = sorted(sample["measurement_model"]["htmt"].items(), key=lambda kv: -kv[1])
    listed = re.findall(r"<li><strong>(.*?) and (.*?)</strong>: HTMT ([^,]+),", markup)
    assert [(html.unescape(a) + "|" + html.unescape(b), v) for a, b, v in listed] == [(k, fmt(v)) for k, v in ranked]
    # the sensitivity markers carry the report's shares
    s = sample["paths"][0]["sensitivity"]
    sens = [x for x in svgs(markup) if (x.findtext("title") or "").startswith("Sensitivity of")][0]
    labels = ["".join(t.itertext()) for t in sens.iter("text")]
    assert f"break-even {pct(s['break_even_method_share'])}" in labels
    assert f"estimated share {pct(s['estimated_method_share'])}" in labels
    assert f"interval reaches 0 at {pct(s['ci_covers_zero_at'])}" in labels


def test_answer_says_which_way_the_raw_number_errs(sample, full):
    for report in (sample, full):
        for p, block in zip(report["paths"], decision_blocks(render_html(report)), strict=True):
            e = p["estimates"]
            o, pr = round(e["observed"]["estimate"], 2), round(e[p["preferred"]]["estimate"], 2)
            if o * pr < 0:
                assert "points the other way" in block
            elif abs(pr) < abs(o):
                assert f"the raw survey number, {fmt(o, 2)}, overstates it" in block
            elif abs(pr) > abs(o):
                assert f"the raw survey number, {fmt(o, 2)}, understates it" in block
            # a negative corrected path says why the shared answering style hid part of it
            corrected = p["preferred"].endswith("_adjusted")
            assert ("makes a negative link look weaker" in block) == (corrected and e[p["preferred"]]["estimate"] < 0)
    # the sample survey has a negative path (workload -> engagement) that the raw number understates
    neg = [b for p, b in zip(sample["paths"], decision_blocks(render_html(sample)), strict=True)
           if p["predictor"] == "workload"]
    assert neg and "understates it" in neg[0] and "more workload goes with less engagement" in neg[0]


def test_missing_corrections_say_why(hostile):
    markup = render_html(hostile)
    text = plain(markup)
    assert "not available: the design has no marker construct" in text
    assert "not available: the design has no method construct" in text
    # without a usable method correction the latent model leads, and the page says what that means
    assert all(p["preferred"] in ("latent", "method_factor_adjusted") for p in hostile["paths"])


def test_no_paths_is_said_not_hidden(no_paths):
    page = Page(render_html(no_paths))
    assert no_paths["paths"] == []
    assert "The design declares no key paths." in "".join(page.texts)
    assert not [i for i in page.ids() if i.startswith("forest-")]


# --------------------------------------------------------------------------- cautions, escaping, groups

@pytest.mark.parametrize("name", ["sample", "no_paths"])
def test_cautions_in_full_near_the_top_and_again(reports, name):
    report = reports[name]
    markup = render_html(report)
    assert report["cautions"]
    top = markup.index('id="cautions"')
    assert top < markup.index('id="paths"')  # before any evidence
    for c in report["cautions"]:
        esc = html.escape(c, quote=True)
        assert markup.count(esc) == 2, c  # in full, in the top box and repeated at the end
        assert top < markup.index(esc)
    # the print stylesheet never hides them, and starts each major section on a new page
    print_css = Page(markup).css.split("@media print", 1)[1]
    for selector, body in re.findall(r"([^{}]+)\{([^{}]*)\}", print_css):
        if "display:none" in body.replace(" ", ""):
            assert ".cautions" not in selector and "#cautions" not in selector
    assert re.search(r"section\.major\{break-before:page\}", print_css)


def test_hostile_names_are_escaped(hostile):
    markup = render_html(hostile)
    page = Page(markup)
    assert page.errors == []
    assert "<script" not in markup.lower() and "<b>" not in markup and "<img" not in markup.lower()
    assert not any("onerror" in a for _, a in page.tags)
    text = "".join(page.texts)
    assert HOSTILE in text and HOSTILE_2 in text and HOSTILE_ITEM in text  # shown as text
    assert html.escape(HOSTILE) in markup
    for s in svgs(markup):  # still well-formed with the names inside
        assert s.get("role") == "img"


def test_groups_below_the_minimum_are_never_shown(boot_teams):
    teams = boot_teams["teams"]
    assert isinstance(teams, dict)
    k = teams["min_group_size"]
    r = copy.deepcopy(boot_teams)
    r["teams"]["group_scores"] = list(r["teams"]["group_scores"]) + [
        {"group": "TINYGROUP", "n": k - 1, "sup": 9.99},
        {"group": "NOSIZEGROUP", "sup": 9.98},
    ]
    markup = render_html(r)
    assert "TINYGROUP" not in markup and "NOSIZEGROUP" not in markup
    page = Page(markup)
    shown = page.table("Mean scale scores per group")
    assert len(shown) - 1 == len(teams["group_scores"])  # header row + every group at or above k
    for g in teams["group_scores"]:
        assert g["n"] >= k
        assert any(row and row[0] == g["group"] for row in shown)
    for name, c in teams["constructs"].items():
        assert page.row("How much each construct differs", name)[1] == fmt(c["icc1"])


def test_flagged_rows_are_row_numbers_only(sample):
    page = Page(render_html(sample))
    flagged = sample["screening"]["flagged_rows"]
    rows = page.table("Rows flagged for review")[1:]
    assert [r[0] for r in rows] == [str(f["row"]) for f in flagged]
    assert [r[1] for r in rows] == [", ".join(f["reasons"]) for f in flagged]


# --------------------------------------------------------------------------- accessibility

def test_figures_tables_and_svgs_are_labelled(sample):
    markup = render_html(sample)
    page = Page(markup)
    for s in svgs(markup):
        assert s.get("role") == "img" and s.get("viewBox")
        title_id, desc_id = s.get("aria-labelledby").split()
        assert s.find("title").get("id") == title_id and s.find("desc").get("id") == desc_id
        assert s.findtext("title").strip() and s.findtext("desc").strip()
    figures = re.findall(r"<figure\b.*?</figure>", markup, flags=re.S)
    assert figures and all("<figcaption>" in f and "What to look for" in f for f in figures)
    for t in page.tables:
        assert t["caption"]
        assert t["th_scopes"] and all(s in ("col", "row") for s in t["th_scopes"])


def test_colour_contrast_meets_wcag_aa(no_paths):
    # WCAG 2.x contrast ratio: black on white is 21:1; #767676 is the lightest grey that still
    # reaches 4.5:1 on white (published WCAG guidance, from memory).
    assert svg.contrast("#000000", "#ffffff") == pytest.approx(21.0)
    assert svg.contrast("#767676", "#ffffff") == pytest.approx(4.54, abs=0.01)
    pairs = [(svg.INK, "#ffffff"), (svg.MUTED, "#ffffff"), (svg.ACCENT, "#ffffff"), (svg.HIGHLIGHT, "#ffffff"),
             (svg.FAIL, "#ffffff"), (svg.INK, svg.HIGHLIGHT_BG), (svg.MUTED, svg.SHADE), (svg.INK, svg.SHADE),
             ("#ffffff", svg.HIGHLIGHT)]
    # the page's own colours, read from its stylesheet
    v = dict(re.findall(r"(--[\w-]+):(#[0-9a-f]{6})", Page(render_html(no_paths)).css))
    pairs += [(v["--ink"], "#ffffff"), (v["--muted"], "#ffffff"), (v["--muted"], v["--panel"]),
              (v["--accent"], "#ffffff"), (v["--accent"], v["--panel"]), (v["--ok"], "#ffffff"),
              (v["--ok"], v["--panel"]), (v["--bad"], "#ffffff"), (v["--bad"], v["--panel"]),
              (v["--ink"], "#fdeeee"), (v["--hl"], "#ffffff"), ("#ffffff", v["--hl"]), (v["--ink"], v["--hl-bg"]),
              (v["--ink"], v["--caution-bg"]), ("#5c3a00", v["--caution-bg"]), ("#7a4d00", "#ffffff"),
              ("#7a4d00", v["--panel"])]
    for fg, bg in pairs:
        assert svg.contrast(fg, bg) >= 4.5, (fg, bg)
    # heat-map cells: whatever the shade, the printed value keeps 4.5:1
    for top in (svg.ACCENT, svg.HIGHLIGHT, "#6b3fa0"):
        for i in range(21):
            cell = svg.heat_fill(top, i / 20)
            assert svg.contrast(svg.text_on(cell), cell) >= 4.5, (top, i)


def test_render_is_pure(sample):
    before = json.dumps(sample, sort_keys=True)
    assert render_html(sample) == render_html(sample)
    assert json.dumps(sample, sort_keys=True) == before  # the report is not changed


# --------------------------------------------------------------------------- the first screen and new fields

def _card_blocks(markup: str) -> list[str]:
    return re.findall(r'<div class="answer-path decision"[^>]*>.*?<p class="sub numbers">.*?</p>', markup, flags=re.S)


def test_review_checks_and_trust_lead_the_page(sample):

    r = with_new_fields(sample)
    markup = render_html(r)
    page = Page(markup)
    assert page.errors == [] and _leaks(markup) == []
    # "review before use" at the very top, naming the items and the fix
    review = markup.index('id="review"')
    assert review < markup.index('id="answer"') < markup.index('id="cautions"')
    block = plain(markup[review:markup.index("</section>", review)])
    assert "Review before use" in block and "wld2, wld4" in block and 'mark wld2 and wld4 as "reverse"' in block
    # the assumption checks come before any estimate: status and message in view, the rest as detail
    strip = markup.index('id="assumptions"')
    assert strip < markup.index('id="decision-1"') < markup.index('id="paths"')
    labels = {"holds": "holds", "doubtful": "doubtful", "fails": "fails", "untestable": "cannot be tested"}
    items = re.findall(r"<li><details><summary>(.*?)</summary>(.*?)</details></li>",
                       markup[strip:markup.index('id="decision-1"')], flags=re.S)
    assert len(items) == len(r["assumptions"])
    for a, (summary, detail) in zip(r["assumptions"], items, strict=True):
        assert plain(summary).endswith(f"{labels[a['status']]} {a['message']}")
        d = plain(detail)
        assert all(e in d for e in a["evidence"]) and a["rule"] in d and a["source"] in d
        assert "Marker-adjusted" in d and "Method-factor adjusted" in d  # the estimates resting on it, by name
    # one card per path: the trust light in words and in filled notches (readable without colour)
    for p, card in zip(r["paths"], _card_blocks(markup), strict=True):
        level = p["trust"]["level"]
        assert f"Trust: {level}" in plain(card)
        assert f'aria-label="How far the answer can be trusted: {level}"' in card
        assert card.count('class="notch on"') == {"high": 3, "medium": 2, "low": 1}[level]
        text = plain(card)
        b = p["bounds"]
        assert f"between {fmt(b['low'], 2)} and {fmt(b['high'], 2)}" in text
        assert ("This survey cannot pin the answer down: " + p["cannot_pin_down"] in text) == p["bounds_wide"]
    # HTMT2 and the variant beside HTMT
    mm = r["measurement_model"]
    assert f"HTMT variant: {mm['htmt_variant']}." in plain(markup)
    k, v = next(iter(mm["htmt2"].items()))
    assert f"HTMT2 {fmt(v)}" in plain(markup)
    # the sensitivity figure marks the published range and the estimated share's interval
    sens = [x for x in svgs(markup) if (x.findtext("title") or "").startswith("Sensitivity of")][0]
    assert "published range" in ["".join(t.itertext()) for t in sens.iter("text")]
    assert f"{pct(0.0)} to {pct(0.3)}" in plain(markup) and f"{pct(0.08)} to {pct(0.16)}" in plain(markup)


def test_new_fields_missing_or_partial_do_not_break(sample):

    r = with_new_fields(sample)
    r["assumptions"] = [{"id": "odd"}, {"status": "nonsense", "message": None}, None, "text"]
    r["review_reasons"] = None
    for p in r["paths"]:
        p["trust"], p["bounds"] = {"level": "sky-high"}, {"low": None}
        p["sensitivity"]["marks"] = {"published_range": None}
    r["paths"][0].pop("trust")
    markup = render_html(r)
    page = Page(markup)
    assert page.errors == [] and _leaks(markup) == []
    assert all("Trust: not rated" in plain(c) for c in _card_blocks(markup))
    assert "Review before use" in plain(markup)  # review_needed without reasons still asks for review


def test_undetermined_verdict(sample):
    r = copy.deepcopy(sample)
    r["method_variance"]["verdict"]["level"] = "undetermined"
    page = Page(render_html(r))
    assert "Common-method variance: UNDETERMINED" in [t for _, t in page.headings]


def test_every_chart_downloads_as_svg_and_png(sample):
    import base64

    markup = render_html(sample)
    n_charts = len(svgs(markup))
    links = re.findall(r'<a download="([^"]+)" href="data:image/(svg\+xml|png);base64,([^"]+)">', markup)
    svg_links = [(n, b) for n, kind, b in links if kind == "svg+xml"]
    png_links = [(n, b) for n, kind, b in links if kind == "png"]
    assert len(svg_links) == len(png_links) == n_charts
    for name, b64 in svg_links:
        root = ET.fromstring(base64.b64decode(b64))
        assert name.endswith(".svg") and root.tag == "{http://www.w3.org/2000/svg}svg"
    for name, b64 in png_links:
        assert name.endswith(".png") and base64.b64decode(b64)[:8] == b"\x89PNG\r\n\x1a\n"  # the PNG signature


def test_teams_say_why_a_value_is_missing_and_mark_imprecise_intervals(sample):
    page = Page(render_html(sample))
    rows = page.table("Key paths within and between groups")[1:]
    for p, row in zip(sample["teams"]["paths"], rows, strict=True):
        same, split = row[4], row[5]
        if p["same_source_team"]["estimate"] is None:
            assert same.startswith("not available: ") and len(same) > 30
        ci = p["split_source"]["ci"]
        if ci and ci[1] - ci[0] > 1.0:
            assert split.startswith("too imprecise to read") and interval(ci) in split
        elif p["split_source"]["estimate"] is None:
            assert split.startswith("not available: ")
        # splits null: the covariances averaged over every split (measurement/statistics/teams.py)
        assert p["split_source"]["splits"] is None
        assert f"(every split, {p['split_source']['teams_used']} groups)" in split
    assert any("too imprecise to read" in r[5] for r in rows)  # the sample's split estimates are


def test_fit_reads_as_a_sentence():
    from samesource.output.report import Report
    from samesource.output.report_html import fit_sentence

    # thresholds as the report carries them (Hu & Bentler 1999 cut-offs, common practice)
    th = {"cfi": {"value": 0.95, "direction": ">="}, "tli": {"value": 0.95, "direction": ">="},
          "rmsea": {"value": 0.06, "direction": "<="}, "srmr": {"value": 0.08, "direction": "<="}}

    def sentence(fit: dict) -> str:  # the fit and thresholds read as the page reads them
        r = Report.from_dict({"measurement_model": {"status": "ok", "fit": fit}, "thresholds": th})
        return fit_sentence(r.measurement_model.fit, r.thresholds)

    good = {"cfi": 0.98, "tli": 0.97, "rmsea": 0.03, "srmr": 0.04}
    assert sentence(good) == "The measurement model fits well by all four usual checks."
    assert sentence({**good, "rmsea": 0.09}) == ("The measurement model fits well by three of the 4 usual "
                                                "checks; RMSEA falls short.")
    assert "misses every one" in sentence({"cfi": 0.5, "tli": 0.5, "rmsea": 0.2, "srmr": 0.2})
    assert "could not be judged" in sentence({})


def test_decision_sentences():
    from samesource.output.decision import DIRECTION_NOTE, sentence
    from samesource.output.report import Report

    def path(obs, pref, ci, key="method_factor_adjusted"):  # a key path as report.json has it, read
        p = {"predictor": "workload", "outcome": "engagement", "preferred": key,
             "estimates": {"observed": {"estimate": obs}, key: {"estimate": pref, "ci": ci}}}
        return Report.from_dict({"paths": [p]}).paths[0]

    s, note = sentence(path(-0.01, -0.193, [-0.255, -0.131]))
    assert s.startswith("Workload matters a little for engagement (more workload goes with less engagement): "
                        f"about {MINUS}0.19 on a {MINUS}1 to 1 scale once the shared answering style")
    assert s.endswith(f"the raw survey number, {MINUS}0.01, understates it.") and note == DIRECTION_NOTE
    s, note = sentence(path(0.40, 0.05, [-0.02, 0.12]))
    assert s.startswith("Workload may not matter for engagement") and "overstates it" in s and note is None
    s, _ = sentence(path(0.40, 0.45, [0.4, 0.5], key="latent"))
    assert "could not be removed and may remain" in s and "understates it" in s
    s, _ = sentence(path(0.2, -0.2, [-0.3, -0.1]))
    assert "points the other way" in s
    s, note = sentence(path(0.2, None, None))
    assert s.startswith("No estimate could be computed") and note is None


def test_brief_is_one_page_of_the_decision(sample):

    r = with_new_fields(sample)
    markup = render_brief(r, when="2026-01-01 10:00 UTC")
    page = Page(markup)
    assert page.errors == [] and _leaks(markup) == []
    text = plain(markup)
    assert "produced 2026-01-01 10:00 UTC" in text and r["data"]["sha256"] in text
    assert markup.index('id="review"') < markup.index('id="answer"')
    assert len(_card_blocks(markup)) == len(r["paths"])
    for c in r["cautions"][:3]:  # the three that matter most, in full
        assert html.escape(c, quote=True) in markup
    assert f"{len(r['cautions']) - 3} more cautions in the full report" in text
    assert "http://" not in markup and "https://" not in markup
    for tag, _ in page.tags:
        assert tag not in ("script", "link", "img", "iframe")


def test_first_screen_speaks_plainly(sample):
    # the first screen (up to the list of detail sections) carries none of the trade shorthand
    # the detail sections use, and no model name
    markup = render_html(with_new_fields(sample, review=False))
    first = plain(markup[markup.index('id="answer"'):markup.index('class="toc"')])
    for jargon in ("BCa", "r_M", "test p", "standardized coefficient", "latent model", "Wald", "disattenuated"):
        assert jargon not in first, jargon
    assert first.count("on a \u22121 to 1 scale") == len(sample["paths"])


def test_forest_labels_are_level_with_their_points(sample):
    for s in svgs(render_html(sample)):
        if not (s.findtext("title") or "").startswith("Every estimate of"):
            continue
        marks = [(float(c.get("cy")), "circle") for c in s.iter("circle")]
        marks += [(sum(float(pt.split(",")[1]) for pt in p.get("points").split()) / 4, "diamond")
                  for p in s.iter("polygon")]
        labels = [float(t.get("y")) for t in s.iter("text") if float(t.get("x")) < 20]
        assert marks and labels
        for cy, _ in marks:  # some label line sits on the point's line (text baseline about 5 px below centre)
            assert min(abs(y - 5 - cy) for y in labels) < 6, cy


def test_why_the_preferred_estimate_leads_is_kept(sample):
    text = plain(render_html(sample))
    for p in sample["paths"]:
        assert f"Why {method_label(p['preferred'])} leads: {p['preferred_reason']}." in text
