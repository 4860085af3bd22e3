"""Start the page on waitress (a production WSGI server), on loopback unless a token protects it."""
from __future__ import annotations

import ipaddress
import re
import socket
from typing import Callable

from .guard import is_loopback  # noqa: F401 (the CLI and tests take it from here)


class ServeError(Exception):
    pass


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


def check_allow_host(name: str) -> str:
    """A name for --allow-host: a host name or IP address, no scheme, port, path or wildcard."""
    bare = name.strip().lower().strip("[]").rstrip(".")
    label = re.compile(r"[a-z0-9]([a-z0-9-]{0,61}[a-z0-9])?")
    if (bare and all(label.fullmatch(part) for part in bare.split("."))) or _is_ipv6(bare):
        return bare
    raise ServeError(f"--allow-host takes a host name or IP address such as photos.lan (no scheme, port or "
                     f"wildcard), not {name!r}")


def _is_ipv6(name: str) -> bool:
    try:
        return ipaddress.ip_address(name).version == 6
    except ValueError:
        return False


def answered_names(host: str, port: int, allow_hosts: tuple[str, ...]) -> list[str]:
    """The Host names this server will answer to, for people (web.guard.HostRule decides)."""
    from .guard import LOOPBACK_NAMES, WILDCARDS

    shown = lambda name: f"[{name}]" if ":" in name else name  # noqa: E731
    names = [f"{shown(n)}:{port}" for n in dict.fromkeys(LOOPBACK_NAMES + (() if host in WILDCARDS else (host,)))]
    if host in WILDCARDS:
        names.append(f"any numeric IP address:{port}")
    return names + [shown(n) for n in allow_hosts]


def free_port(host: str = "127.0.0.1") -> int:
    with socket.socket() as s:
        s.bind((host, 0))
        return s.getsockname()[1]


def serve(db: str, host: str, port: int, token: str | None, threads: int = 4,
          allow_hosts: tuple[str, ...] = (), announce: Callable[[dict], None] | None = None,
          warm_explanations: bool = True) -> None:
    """Serve the page until stopped. The query model is loaded and run once and the default layer's
    store read before `announce({engine, seconds})` is called (the socket is already listening then),
    so the first search waits for no model. Torch, which only explanations need, is loaded afterwards
    in a background thread (warm_explanations); a search asked while it loads can wait a few tenths
    of a second for Python's interpreter lock (docs/benchmarks.md)."""
    from waitress import create_server

    from . import create_app
    from .archive_access import Holder

    check_binding(host, token)
    app = create_app({"KINSCOPE_DB": db, "KINSCOPE_TOKEN": token, "KINSCOPE_LISTEN": host, "KINSCOPE_PORT": port,
                      "KINSCOPE_ALLOW_HOSTS": tuple(allow_hosts)})
    holder: Holder = app.extensions["kinscope"]
    ready = holder.warm()
    server = create_server(app, host=host, port=port, threads=threads, ident="kinscope",
                           clear_untrusted_proxy_headers=True)
    if announce is not None:
        announce(ready)
    if warm_explanations:
        holder.warm_explanations_later()
    server.run()
