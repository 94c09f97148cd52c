"""Security headers on every answer, and the content security policy of every HTML route.

The policy rules checked here are those of the W3C Content Security Policy Level 3
recommendation, from memory: a hash source is 'sha256-' and the base64 of the SHA-256 of the
element's text, and hashes cover <script> and <style> elements only, never style or event
handler attributes. The hashes are computed here with hashlib; tests/test_browser.py checks
the same pages in Chromium, which logs a violation for anything the policy refuses.
"""

from __future__ import annotations

import base64
import hashlib
import io
import re
from html.parser import HTMLParser
from pathlib import Path

import pytest

from samesource.service.app import create_app
from samesource.service.context import EXTENSION

pytestmark = pytest.mark.filterwarnings("ignore::DeprecationWarning")

ROOT = Path(__file__).resolve().parents[1]
SURVEY = (ROOT / "sample_surveys" / "staff_survey.csv").read_bytes()
# a report the pipeline wrote (tests/test_report_pinned.py keeps it current)
REPORT = (ROOT / "tests" / "data" / "pinned_report_listwise.json").read_text()
DESIGN = {"constructs": {"support": {"items": ["sup1", "sup2", "sup3"]},
                         "engagement": {"items": ["eng1", "eng2", "eng3"]}},
          "paths": [{"outcome": "engagement", "predictors": ["support"]}]}


@pytest.fixture(scope="module")
def served(tmp_path_factory):
    """An app holding one succeeded analysis (its report stored as the runner would)."""
    app = create_app({"data_dir": tmp_path_factory.mktemp("headers"), "run_jobs": False})
    svc = app.extensions[EXTENSION]
    token = svc.store.create_token("acme")
    hdrs = {"Authorization": f"Bearer {token}"}
    c = app.test_client()
    ds = c.post("/v1/datasets", headers=hdrs, content_type="multipart/form-data",
                data={"file": (io.BytesIO(SURVEY), "staff_survey.csv")}).get_json()
    aid = c.post("/v1/analyses", headers=hdrs,
                 json={"dataset_id": ds["id"], "design": DESIGN}).get_json()["id"]
    claim = svc.store.claim_next("test-runner")
    assert claim.analysis_id == aid and svc.store.finish(claim, report=REPORT)
    yield app, c, hdrs, {"dataset_id": ds["id"], "analysis_id": aid, "name": "constructs"}
    svc.close()


def parse_policy(header: str) -> dict[str, list[str]]:
    out: dict[str, list[str]] = {}
    for part in header.split(";"):
        words = part.split()
        if words:
            assert words[0].lower() not in out, f"directive {words[0]} given twice"
            out[words[0].lower()] = words[1:]
    return out


def sha256_source(text: str) -> str:
    return "'sha256-" + base64.b64encode(hashlib.sha256(text.encode()).digest()).decode() + "'"


class Markup(HTMLParser):
    """The inline scripts and stylesheets of a document, and what a hash cannot allow."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=False)
        self.inline: dict[str, list[str]] = {"script": [], "style": []}
        self.problems: list[str] = []
        self._open: str | None = None

    def handle_starttag(self, tag, attrs):
        names = {k.lower(): v for k, v in attrs}
        for name in names:
            if name == "style" or name.startswith("on"):
                self.problems.append(f"<{tag} {name}=...>")
        if tag in ("script", "style"):
            if "src" in names:
                self.problems.append(f"<{tag} src=...>")
            self._open = tag
            self.inline[tag].append("")
        if tag == "link" and "stylesheet" in (names.get("rel") or ""):
            self.problems.append("<link rel=stylesheet>")

    def handle_data(self, data):
        if self._open:
            self.inline[self._open][-1] += data

    def handle_endtag(self, tag):
        if tag == self._open:
            self._open = None


def html_routes(app) -> list[str]:
    return sorted(r.rule for r in app.url_map.iter_rules() if "GET" in r.methods)


def test_every_html_route_allows_only_our_own_inline_code_by_hash(served):
    app, c, hdrs, ids = served
    answers = {}
    for rule in html_routes(app):
        url = re.sub(r"<(?:\w+:)?(\w+)>", lambda m: ids[m.group(1)], rule)
        r = c.get(url, headers=hdrs)
        if r.mimetype == "text/html":
            assert r.status_code == 200, (rule, r.status_code)
            answers[rule] = r
    # a new HTML route must be added here, with its own policy checked
    assert sorted(answers) == ["/", "/v1/analyses/<analysis_id>/brief.html",
                               "/v1/analyses/<analysis_id>/report.html"]
    for rule, r in answers.items():
        header = r.headers["Content-Security-Policy"]
        pol = parse_policy(header)
        assert pol["default-src"] == ["'none'"], rule
        for directive in ("frame-ancestors", "base-uri", "form-action"):
            assert pol[directive] == ["'none'"], (rule, directive)
        assert not re.search(r"unsafe-|\*|https?:|blob:", header), (rule, header)
        for directive in ("script-src", "style-src"):
            assert all(s.startswith("'sha256-") for s in pol.get(directive, [])), (rule, directive)
        assert set(pol) <= {"default-src", "script-src", "style-src", "img-src", "connect-src",
                            "frame-ancestors", "base-uri", "form-action"}, rule
        assert pol.get("img-src", ["data:"]) == ["data:"], rule
        doc = Markup()
        doc.feed(r.get_data(as_text=True))
        assert doc.problems == [], (rule, doc.problems[:5])
        for tag, directive in (("script", "script-src"), ("style", "style-src")):
            for text in doc.inline[tag]:
                assert sha256_source(text) in pol.get(directive, []), (rule, tag)
        assert r.headers["X-Content-Type-Options"] == "nosniff"
        assert r.headers["Referrer-Policy"] == "no-referrer"
        assert r.headers["X-Frame-Options"] == "DENY"
    page = parse_policy(answers["/"].headers["Content-Security-Policy"])
    assert len(page["script-src"]) == 1 and page["connect-src"] == ["'self'"]
    for rule in ("/v1/analyses/<analysis_id>/report.html", "/v1/analyses/<analysis_id>/brief.html"):
        pol = parse_policy(answers[rule].headers["Content-Security-Policy"])
        assert "script-src" not in pol and "connect-src" not in pol, rule  # no scripts at all
        doc = Markup()
        doc.feed(answers[rule].get_data(as_text=True))
        assert doc.inline["script"] == [] and len(doc.inline["style"]) == 1, rule
    # the page opens report.html from a blob: address, which keeps the page's policy: the
    # report's stylesheet must be allowed there too
    report = Markup()
    report.feed(answers["/v1/analyses/<analysis_id>/report.html"].get_data(as_text=True))
    assert sha256_source(report.inline["style"][0]) in page["style-src"]


def test_json_answers_are_nosniff_too(served):
    app, c, hdrs, ids = served
    aid = ids["analysis_id"]
    for r in (c.get("/healthz"), c.get("/v1/datasets"), c.get("/v1/datasets", headers=hdrs),
              c.get("/nothing"), c.get("/v1/openapi.json"), c.post("/v1/analyses", headers=hdrs),
              c.get(f"/v1/analyses/{aid}/report.json", headers=hdrs),
              c.get(f"/v1/analyses/{aid}", headers=hdrs)):
        assert r.mimetype == "application/json", (r.request.path, r.mimetype)
        assert r.headers["X-Content-Type-Options"] == "nosniff", r.request.path
        assert r.headers["Referrer-Policy"] == "no-referrer", r.request.path
    tables = c.get(f"/v1/analyses/{aid}/tables/constructs.csv", headers=hdrs)
    assert tables.status_code == 200 and tables.headers["X-Content-Type-Options"] == "nosniff"
