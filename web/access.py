"""Every response gets security headers; with a token configured, every request must carry it."""
from __future__ import annotations

import hmac

from flask import Flask, jsonify, make_response, request

COOKIE = "kinscope_token"

CSP = (
    "default-src 'self'; img-src 'self' data: blob:; style-src 'self'; script-src 'self'; "
    "connect-src 'self'; object-src 'none'; base-uri 'none'; frame-ancestors 'none'; form-action 'self'"
)


def init_app(app: Flask) -> None:
    @app.before_request
    def check_token():
        expected = app.config.get("KINSCOPE_TOKEN")
        if not expected:
            return None
        given = (
            request.headers.get("Authorization", "").removeprefix("Bearer ").strip()
            or request.args.get("token", "")
            or request.cookies.get(COOKIE, "")
        )
        if not hmac.compare_digest(given.encode(), expected.encode()):
            return make_response(jsonify(error="this kinscope server needs its access token"), 401)
        return None

    @app.after_request
    def headers(response):
        response.headers["Content-Security-Policy"] = CSP
        response.headers["X-Content-Type-Options"] = "nosniff"
        response.headers["X-Frame-Options"] = "DENY"
        response.headers["Referrer-Policy"] = "no-referrer"
        response.headers["Cross-Origin-Resource-Policy"] = "same-origin"
        token = app.config.get("KINSCOPE_TOKEN")
        if token and request.args.get("token") and request.cookies.get(COOKIE) != token:
            # A browser that opened the page with ?token= keeps it for the page's own requests.
            response.set_cookie(COOKIE, token, httponly=True, samesite="Strict")
        return response
