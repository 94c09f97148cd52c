"""Security headers, and the content security policies of the service's HTML answers.

Every policy allows only code and styles that we wrote, named by their SHA-256 (CSP level 2
hashes): never 'unsafe-inline', never another origin.

* report.html and brief.html carry no scripts at all: their policy has no script source, and
  their one inline stylesheet (measurement's report.css or brief.css) is allowed by its hash.
* The page at / inlines its own script and stylesheet (service/static/app.js, app.css) and
  allows those by hash. It opens report.html from a ``blob:`` address (fetched with the
  token, so the token never goes into a link), and a ``blob:`` document inherits the policy
  of the page that made it: so the page's policy also allows the report's stylesheet.

The hashes come from the files we serve, never from the body being answered: a policy that
allowed whatever the body holds would allow an injected script too.
"""

from __future__ import annotations

import base64
import functools
import hashlib

from flask import Response

# Directives every HTML answer has: nothing may frame it, change its base or submit a form.
_CLOSING = ("frame-ancestors 'none'", "base-uri 'none'", "form-action 'none'")


def hash_source(text: str) -> str:
    """The CSP source expression allowing exactly this inline script or stylesheet."""
    digest = hashlib.sha256(text.encode("utf-8")).digest()
    return f"'sha256-{base64.b64encode(digest).decode('ascii')}'"


@functools.lru_cache(maxsize=1)
def report_stylesheets() -> tuple[str, ...]:
    """The stylesheets the report and brief renderers inline (empty when this version has no
    renderer: those routes then answer 404)."""
    try:
        from samesource.output.report_html import stylesheet
    except ImportError:  # pragma: no cover - depends on the version installed
        return ()
    return tuple(str(stylesheet(name)) for name in ("report.css", "brief.css"))


def policy(*, scripts: tuple[str, ...] = (), styles: tuple[str, ...] = (),
           connect_self: bool = False) -> str:
    """A policy allowing nothing but the given inline scripts and stylesheets (by hash),
    images given as data: addresses and, with ``connect_self``, requests to this origin."""
    parts = ["default-src 'none'"]
    if scripts:
        parts.append("script-src " + " ".join(dict.fromkeys(map(hash_source, scripts))))
    if styles:
        parts.append("style-src " + " ".join(dict.fromkeys(map(hash_source, styles))))
    parts.append("img-src data:")
    if connect_self:
        parts.append("connect-src 'self'")
    return "; ".join([*parts, *_CLOSING])


@functools.lru_cache(maxsize=1)
def document_policy() -> str:
    """report.html, brief.html and any other HTML answer without a policy of its own."""
    return policy(styles=report_stylesheets())


def page_policy(script: str, style: str) -> str:
    """The page at /: its own script and stylesheet, calls to /v1 on this origin, and the
    report's stylesheet for the report it opens from a blob: address."""
    return policy(scripts=(script,), styles=(style, *report_stylesheets()), connect_self=True)


def security_headers(resp: Response) -> Response:
    """On every answer, JSON included: no content sniffing and no referrer; on HTML answers
    also a content security policy (the page at / sets its own) and no framing."""
    resp.headers.setdefault("X-Content-Type-Options", "nosniff")
    resp.headers.setdefault("Referrer-Policy", "no-referrer")
    if resp.mimetype == "text/html":
        resp.headers.setdefault("Content-Security-Policy", document_policy())
        resp.headers.setdefault("X-Frame-Options", "DENY")
    return resp
