"""The page served at ``GET /``: files of the package (``streamcount/web``) and their headers.

The page is one HTML file, one script and one style sheet, with no external asset, so it works
on a closed network. Its files hold no data and need no token; the data comes from the JSON API
the script calls with the same token rules as any client (``Authorization: Bearer``, never a
cookie, never in a URL).

Item names come from the feed and are untrusted. The script writes every value as text
(``textContent``, never HTML), and every page file is served with:

* a Content-Security-Policy that allows scripts, styles, images and connections from the page's
  own origin only (no inline script or style, no ``eval``), refuses every other source, framing
  (``frame-ancestors 'none'``), ``<base>`` and form targets, and enforces Trusted Types with no
  policy, so an HTML sink such as ``innerHTML`` throws instead of parsing a string;
* ``X-Content-Type-Options: nosniff``, ``X-Frame-Options: DENY`` (older browsers),
  ``Referrer-Policy: no-referrer`` and ``Cross-Origin-Opener-Policy: same-origin``.
"""

from __future__ import annotations

from functools import cache
from importlib import resources

__all__ = ["CONTENT_SECURITY_POLICY", "PAGE_FILES", "page_file", "page_headers"]

#: URL path -> (file in streamcount/web, content type)
PAGE_FILES: dict[str, tuple[str, str]] = {
    "/": ("index.html", "text/html; charset=utf-8"),
    "/page/app.js": ("app.js", "text/javascript; charset=utf-8"),
    "/page/style.css": ("style.css", "text/css; charset=utf-8"),
    "/page/icon.svg": ("icon.svg", "image/svg+xml"),
}

CONTENT_SECURITY_POLICY = "; ".join(
    (
        "default-src 'none'",
        "script-src 'self'",
        "style-src 'self'",
        "img-src 'self'",
        "connect-src 'self'",
        "base-uri 'none'",
        "form-action 'none'",
        "frame-ancestors 'none'",
        "require-trusted-types-for 'script'",
        "trusted-types 'none'",
    )
)


def page_headers(content_type: str) -> dict[str, str]:
    """The headers every page file is served with."""
    return {
        "Content-Type": content_type,
        "Content-Security-Policy": CONTENT_SECURITY_POLICY,
        "X-Content-Type-Options": "nosniff",
        "X-Frame-Options": "DENY",
        "Referrer-Policy": "no-referrer",
        "Cross-Origin-Opener-Policy": "same-origin",
        "Cross-Origin-Resource-Policy": "same-origin",
        # the files change only with the package; revalidate rather than serve a stale script
        "Cache-Control": "no-cache",
    }


@cache
def _read(name: str) -> bytes:
    return resources.files("streamcount").joinpath("web", name).read_bytes()


def page_file(path: str) -> tuple[bytes, dict[str, str]]:
    """Body and headers of the page file at URL ``path`` (a key of :data:`PAGE_FILES`).

    Raises
    ------
    KeyError
        For a path that is not a page file.
    """
    name, content_type = PAGE_FILES[path]
    return _read(name), page_headers(content_type)
