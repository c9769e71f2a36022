"""Access token, CSRF check, body size limit and security headers for every response.

* Access token: when the app has one (always when it listens beyond this
  computer), every page and API call must carry it, as the header
  ``X-Contentlab-Token`` (or ``Authorization: Bearer``) or as the cookie the
  one-time link ``/?token=...`` sets; otherwise 401.
* CSRF (double submit): the first page sets a random ``contentlab_csrf``
  cookie (SameSite=Strict) and writes the same value into every form and a
  ``<meta>`` tag; a form post must send it back as the field ``csrf_token``
  or the header ``X-CSRF-Token`` (``static/app.js`` adds the header to htmx
  requests). The JSON API instead requires ``Content-Type: application/json``
  on writes: a page on another site cannot send that without a CORS
  preflight, which this app never grants.
* Body limit: requests larger than the limit get 413, counted on the bytes
  read, not only on the declared ``Content-Length``.
* Headers: a Content-Security-Policy that allows only the app's own files
  (no inline script), no framing by other sites, no sniffing, no referrer.
"""

from __future__ import annotations

import hmac
import json
import secrets
from http.cookies import SimpleCookie
from urllib.parse import parse_qsl, urlencode

TOKEN_HEADER = "x-contentlab-token"
TOKEN_COOKIE = "contentlab_token"
CSRF_COOKIE = "contentlab_csrf"
CSRF_FIELD = "csrf_token"
CSRF_HEADER = "x-csrf-token"

CSP = ("default-src 'self'; script-src 'self'; style-src 'self'; img-src 'self' data:; "
       "connect-src 'self'; frame-src 'self'; frame-ancestors 'self'; form-action 'self'; "
       "base-uri 'none'; object-src 'none'")
# The report page is the library's self-contained HTML (an inline <style>, SVG, no script at all).
REPORT_CSP = ("default-src 'none'; style-src 'unsafe-inline'; img-src data:; frame-ancestors 'self'; "
              "base-uri 'none'; form-action 'none'")
SECURITY_HEADERS = [
    (b"x-content-type-options", b"nosniff"),
    (b"referrer-policy", b"no-referrer"),
    (b"x-frame-options", b"SAMEORIGIN"),
    (b"cross-origin-opener-policy", b"same-origin"),
    (b"cache-control", b"no-store"),
]


class BodyTooLarge(Exception):
    """Raised while reading a request body that passes the size limit (answered with 413)."""

    def __init__(self, limit: int):
        super().__init__(f"The upload is larger than the limit of {limit // 1_000_000} MB; nothing was read. "
                         "Split the file and upload the parts one by one.")
        self.limit = limit


def new_token() -> str:
    return secrets.token_urlsafe(24)


def same(a: str | None, b: str | None) -> bool:
    """Constant-time comparison of two secrets (False when either is missing)."""
    return bool(a) and bool(b) and hmac.compare_digest(a.encode(), b.encode())


def _cookies(headers: dict[bytes, bytes]) -> dict[str, str]:
    raw = headers.get(b"cookie", b"").decode("latin-1")
    jar = SimpleCookie()
    try:
        jar.load(raw)
    except Exception:  # a malformed Cookie header counts as no cookie
        return {}
    return {k: m.value for k, m in jar.items()}


def csrf_ok(request, form=None) -> bool:
    """Whether a form post carries the CSRF value of its cookie (field or header)."""
    cookie = request.cookies.get(CSRF_COOKIE)
    sent = request.headers.get(CSRF_HEADER) or (form.get(CSRF_FIELD) if form is not None else None)
    return same(cookie, sent if isinstance(sent, str) else None)


class SecurityMiddleware:
    """Pure ASGI middleware (no per-request task switching: scoring latency matters)."""

    def __init__(self, app, *, token: str | None, max_body: int, allowed_hosts: list[str] | None):
        self.app = app
        self.token = token
        self.max_body = max_body
        self.allowed_hosts = allowed_hosts

    async def __call__(self, scope, receive, send):
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        headers = dict(scope.get("headers") or [])
        path = scope.get("path", "")
        is_api = path.startswith("/api/") or path == "/api"
        if self.allowed_hosts is not None:
            host = headers.get(b"host", b"").decode("latin-1").rsplit(":", 1)[0].strip("[]").lower()
            if host not in self.allowed_hosts:
                await _plain(send, 400, is_api, "This address is not served here (unexpected Host header).")
                return
        csrf_cookie = _cookies(headers).get(CSRF_COOKIE)
        new_csrf = None if csrf_cookie else secrets.token_urlsafe(24)
        if new_csrf:  # visible to the handler as if the browser had sent it
            scope = dict(scope)
            raw = [(k, v) for k, v in scope.get("headers") or [] if k != b"cookie"]
            jar = headers.get(b"cookie", b"")
            jar = (jar + b"; " if jar else b"") + f"{CSRF_COOKIE}={new_csrf}".encode()
            scope["headers"] = raw + [(b"cookie", jar)]
        extra_cookies: list[bytes] = []
        if new_csrf:
            extra_cookies.append(f"{CSRF_COOKIE}={new_csrf}; Path=/; HttpOnly; SameSite=Strict".encode())

        if self.token:
            query = dict(parse_qsl(scope.get("query_string", b"").decode("latin-1")))
            if scope.get("method") == "GET" and "token" in query:
                if not same(query["token"], self.token):
                    await _plain(send, 401, is_api, "That access link is not valid. Use the link the server printed.")
                    return
                rest = {k: v for k, v in query.items() if k != "token"}
                location = path + (("?" + urlencode(rest)) if rest else "")
                cookie = f"{TOKEN_COOKIE}={self.token}; Path=/; HttpOnly; SameSite=Strict".encode()
                await _redirect(send, location, [cookie] + extra_cookies)
                return
            given = headers.get(TOKEN_HEADER.encode(), b"").decode("latin-1")
            auth = headers.get(b"authorization", b"").decode("latin-1")
            if not given and auth.lower().startswith("bearer "):
                given = auth[7:].strip()
            if not given:
                given = _cookies(headers).get(TOKEN_COOKIE, "")
            if not same(given, self.token):
                await _plain(send, 401, is_api,
                             "An access token is needed: open the link the server printed, or send the header "
                             "X-Contentlab-Token.")
                return

        declared = headers.get(b"content-length")
        if declared is not None:
            try:
                too_big = int(declared) > self.max_body
            except ValueError:
                too_big = True
            if too_big:
                await _plain(send, 413, is_api,
                             f"The request is larger than the limit of {self.max_body // 1_000_000} MB; nothing was read. "
                             "Send it in smaller parts.")
                return
        limit = self.max_body
        seen = 0

        async def limited_receive():
            nonlocal seen
            message = await receive()
            if message["type"] == "http.request":
                seen += len(message.get("body", b""))
                if seen > limit:
                    raise BodyTooLarge(limit)
            return message

        async def with_headers(message):
            if message["type"] == "http.response.start":
                hdrs = list(message.get("headers") or [])
                names = {k.lower() for k, _ in hdrs}
                if b"content-security-policy" not in names:
                    hdrs.append((b"content-security-policy", CSP.encode()))
                hdrs.extend(h for h in SECURITY_HEADERS if h[0] not in names)
                hdrs.extend((b"set-cookie", c) for c in extra_cookies)
                message = dict(message)
                message["headers"] = hdrs
            await send(message)

        await self.app(scope, limited_receive, with_headers)


async def _plain(send, status: int, is_api: bool, message: str) -> None:
    """An error answered before any route: JSON for the API, a short text page otherwise."""
    if is_api:
        body = json.dumps({"error": message}).encode()
        ctype = b"application/json"
    else:
        from markupsafe import escape

        body = (f"<!doctype html><meta charset='utf-8'><title>contentlab</title><p>{escape(message)}</p>").encode()
        ctype = b"text/html; charset=utf-8"
    await send({"type": "http.response.start", "status": status,
                "headers": [(b"content-type", ctype), (b"content-length", str(len(body)).encode()),
                            (b"content-security-policy", CSP.encode()), *SECURITY_HEADERS]})
    await send({"type": "http.response.body", "body": body})


async def _redirect(send, location: str, cookies: list[bytes]) -> None:
    await send({"type": "http.response.start", "status": 303,
                "headers": [(b"location", location.encode("latin-1", "replace")), (b"content-length", b"0"),
                            *[(b"set-cookie", c) for c in cookies], *SECURITY_HEADERS]})
    await send({"type": "http.response.body", "body": b""})
