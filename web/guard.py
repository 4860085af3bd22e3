"""Refuse what a web page in the user's own browser could send: foreign Host names, foreign origins.

Listening on 127.0.0.1 keeps other machines out, not other web pages. A page on a domain the
attacker controls can re-point that name to 127.0.0.1 (DNS rebinding); the browser then treats
this server as part of the attacker's site and sends "Host: attacker.example", so only names this
server was started for are answered (421 otherwise). Any page can also send this server requests
of its own (a form post, an <img>, a no-cors fetch); the browser labels them with Origin and
Sec-Fetch-Site, and everything labelled as coming from another origin or site is refused (403),
except a plain top-level navigation (a link to the page from elsewhere), which reveals nothing to
the page that made it. The checks follow common practice for local web servers: the Host allow-list
as in Django's ALLOWED_HOSTS, the Sec-Fetch-* rules as in the W3C Fetch Metadata Request Headers
draft ("resource isolation policy").
"""
from __future__ import annotations

import ipaddress

from flask import Flask, jsonify, make_response, request

LOOPBACK_NAMES = ("127.0.0.1", "localhost", "::1")
WILDCARDS = ("0.0.0.0", "::", "")
SAFE_METHODS = ("GET", "HEAD", "OPTIONS")
FOREIGN_SITES = ("cross-site", "same-site")  # "same-site" includes other ports of 127.0.0.1


def is_loopback(host: str) -> bool:
    """Whether a listening address is this machine only (127.0.0.0/8, ::1, localhost)."""
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


def split_host(value: str) -> tuple[str, int | None] | None:
    """'name:port', '[v6]:port', 'name' -> (lower-case name, port or None); None when malformed."""
    value = value.strip().lower()
    if value.startswith("["):
        name, sep, rest = value[1:].partition("]")
        if not sep or (rest and not rest.startswith(":")):
            return None
        port = rest[1:] or None
    else:
        name, _, port = value.partition(":") if value.count(":") == 1 else (value, "", "")
        port = port or None
        if value.count(":") > 1:
            return None  # a bare IPv6 address must be bracketed in a Host header
    if not name or (port is not None and not (port.isdigit() and len(port) <= 5)):
        return None
    return name.rstrip("."), int(port) if port else None


def _is_ip(name: str) -> bool:
    try:
        ipaddress.ip_address(name)
        return True
    except ValueError:
        return False


class HostRule:
    """Which Host headers this server answers to.

    Loopback names and the address it listens on must carry its port (when it has one; an app made
    without a port, as in tests, accepts any). Names given with --allow-host are accepted on any port:
    a reverse proxy in front forwards its own. When listening on every address (0.0.0.0 or ::), any
    numeric IP address is accepted too: rebinding needs a domain name, and a page whose address is
    an IP literal is this server's own origin."""

    def __init__(self, listen: str | None, port: int | None, extra: list[str] | tuple[str, ...] = ()):
        self.port = port
        self.wildcard = listen in WILDCARDS
        self.with_port = set(LOOPBACK_NAMES) | ({listen.lower().strip("[]")} if listen and not self.wildcard else set())
        self.any_port = {name.lower().strip("[]").rstrip(".") for name in extra if name}

    def allows(self, header: str | None) -> bool:
        parsed = split_host(header) if header else None
        if parsed is None:
            return False
        name, port = parsed
        if name in self.any_port:
            return True
        port_ok = self.port is None or (port or 80) == self.port
        return port_ok and (name in self.with_port or (self.wildcard and _is_ip(name)))


def _refuse(status: int, message: str):
    if request.path.startswith(("/api/", "/media/")):
        return make_response(jsonify(error=message), status)
    return make_response(message + "\n", status, {"Content-Type": "text/plain; charset=utf-8"})


def _writes() -> bool:
    """A request that changes state or carries data (an upload), whatever its method."""
    return request.method not in SAFE_METHODS or bool(request.content_length) or "Transfer-Encoding" in request.headers


def _foreign_origin() -> bool:
    origin = request.headers.get("Origin")
    if origin is None:
        return False
    scheme, sep, rest = origin.partition("://")
    # Compared by host and port only: behind a TLS-terminating proxy the page is https, this server http.
    return not sep or scheme not in ("http", "https") or rest.lower() != request.host.lower()


def _foreign_site() -> bool:
    if request.headers.get("Sec-Fetch-Site") not in FOREIGN_SITES:
        return False  # same-origin, none (typed address, bookmark) or an older browser
    top_level_visit = (request.method in ("GET", "HEAD") and not _writes()
                       and request.headers.get("Sec-Fetch-Mode") == "navigate"
                       and request.headers.get("Sec-Fetch-Dest", "document") == "document")
    return not top_level_visit


def init_app(app: Flask) -> None:
    c = app.config
    rule = HostRule(c.get("KINSCOPE_LISTEN"), c.get("KINSCOPE_PORT"), c.get("KINSCOPE_ALLOW_HOSTS") or ())

    @app.before_request
    def check_host():
        if not rule.allows(request.environ.get("HTTP_HOST")):
            shown = request.environ.get("HTTP_HOST", "(none)")[:100]
            return _refuse(421, f"this kinscope server does not answer to the name {shown!r}; open it by the "
                                "address it printed at start, or start it with --allow-host NAME")
        return None

    @app.before_request
    def check_origin():
        if _foreign_origin() or _foreign_site():
            return _refuse(403, "this kinscope server refuses requests made by another web site or origin")
        return None
