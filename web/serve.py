"""Start the page on waitress (a production WSGI server), on loopback unless a token protects it."""
from __future__ import annotations

import ipaddress
import socket


class ServeError(Exception):
    pass


def is_loopback(host: str) -> bool:
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


def check_binding(host: str, token: str | None) -> None:
    """Anything but loopback exposes the archive to the network: refuse that without a token."""
    if not is_loopback(host) and not token:
        raise ServeError(
            f"refusing to listen on {host}: that exposes the archive to other machines. "
            "Set an access token with --token or KINSCOPE_TOKEN (every request must then carry it), "
            "or keep the default 127.0.0.1."
        )
    if token is not None and len(token) < 16:
        raise ServeError("the access token must be at least 16 characters long")


def free_port(host: str = "127.0.0.1") -> int:
    with socket.socket() as s:
        s.bind((host, 0))
        return s.getsockname()[1]


def serve(db: str, host: str, port: int, token: str | None, threads: int = 4) -> None:
    from waitress import serve as waitress_serve

    from . import create_app

    check_binding(host, token)
    app = create_app({"KINSCOPE_DB": db, "KINSCOPE_TOKEN": token})
    waitress_serve(app, host=host, port=port, threads=threads, ident="kinscope", clear_untrusted_proxy_headers=True)
