"""Every response gets security headers; foreign hosts and origins are refused (web.guard); with a
token configured, every request must carry it.

A browser gives the token once, in the address (?token=...): the page answers with a session cookie
(HttpOnly, SameSite=Strict) and sends the browser to the same address without the token, so it does
not stay in the address bar or the history. Other clients send "Authorization: Bearer TOKEN"."""
from __future__ import annotations

import hmac
from urllib.parse import urlencode

from flask import Flask, jsonify, make_response, redirect, request

from . import guard

COOKIE = "kinscope_token"

CSP = (
    "default-src 'self'; img-src 'self' data: blob:; style-src 'self'; script-src 'self'; "
    "connect-src 'self'; object-src 'none'; base-uri 'none'; frame-ancestors 'none'; form-action 'self'"
)


def cookie_name(app: Flask) -> str:
    # Cookies are not kept apart by port: two servers on one machine would overwrite each other's.
    port = app.config.get("KINSCOPE_PORT")
    return f"{COOKIE}_{port}" if port else COOKIE


def _matches(given: str, expected: str) -> bool:
    return bool(given) and hmac.compare_digest(given.encode(), expected.encode())


def _is_page() -> bool:
    return request.method == "GET" and not request.path.startswith(("/api/", "/media/", "/static/"))


def _without_token():
    args = [(k, v) for k, v in request.args.items(multi=True) if k != "token"]
    return request.path + ("?" + urlencode(args) if args else "")


def init_app(app: Flask) -> None:
    guard.init_app(app)  # registered first: a foreign Host or origin is refused before anything else
    cookie = cookie_name(app)

    @app.before_request
    def check_token():
        expected = app.config.get("KINSCOPE_TOKEN")
        if not expected:
            return None
        bearer = request.headers.get("Authorization", "")
        if bearer.startswith("Bearer ") and _matches(bearer.removeprefix("Bearer ").strip(), expected):
            return None
        if _matches(request.cookies.get(cookie, ""), expected):
            return None
        if _matches(request.args.get("token", ""), expected):
            if not _is_page():
                return None  # a script's request; the address is not shown to anyone
            response = redirect(_without_token(), 303)
            response.set_cookie(cookie, expected, httponly=True, samesite="Strict", path="/")
            return response
        return make_response(jsonify(error="this kinscope server needs its access token"), 401)

    @app.context_processor
    def exposure():
        # What the page's cautions say depends on where this server listens.
        from .guard import is_loopback

        return {"on_loopback": is_loopback(app.config.get("KINSCOPE_LISTEN") or "127.0.0.1")}

    @app.after_request
    def headers(response):
        response.headers["Content-Security-Policy"] = CSP
        response.headers["X-Content-Type-Options"] = "nosniff"
        response.headers["X-Frame-Options"] = "DENY"
        # same-origin, not no-referrer: with no-referrer a browser labels the page's own form posts "Origin:
        # null" (Fetch standard, the request Origin header), which the origin check must refuse; same-origin
        # still sends nothing to any other site.
        response.headers["Referrer-Policy"] = "same-origin"
        response.headers["Cross-Origin-Resource-Policy"] = "same-origin"
        return response
