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


THREADS = 8  # a results page asks for 24 thumbnails at once; 8 answer them without a long queue on a laptop


class PortBusy(ServeError):
    pass


def limit_malloc_arenas() -> None:
    """glibc gives threads up to 8 malloc arenas per core, each keeping freed memory: with 8 threads the mixed
    load test (scripts/load_test.py) grew the server by 450 MB against 200 MB with 4 threads; at one arena per
    core (at least 2) it grew 113 MB. Set before waitress starts its threads; elsewhere than glibc, nothing."""
    import ctypes
    import ctypes.util
    import os

    try:
        mallopt = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6").mallopt
    except (OSError, AttributeError):
        return
    mallopt.argtypes, mallopt.restype = [ctypes.c_int, ctypes.c_int], ctypes.c_int
    mallopt(-8, max(2, os.cpu_count() or 1))  # M_ARENA_MAX, from glibc's malloc.h


def quiet_routine_logs() -> None:
    """waitress logs "Task queue depth is N" at WARNING whenever requests wait for a thread: routine while a
    page loads its thumbnails, but it reads like an error. Keep that logger to errors; everything else of
    waitress (exceptions while serving, for one) still reaches the terminal."""
    import logging

    logging.basicConfig(format="%(levelname)s:%(name)s:%(message)s")
    logging.getLogger("waitress.queue").setLevel(logging.ERROR)


def bind(db: str, host: str, port: int, token: str | None, threads: int = THREADS,
         allow_hosts: tuple[str, ...] = ()):
    """The server, listening on host:port (not yet answering: call .run()). PortBusy when another program
    holds the port, so that nothing claims to serve before the socket is ours."""
    import errno

    from waitress.server import create_server

    from . import create_app
    from .archive_access import Holder

    check_binding(host, token)
    app = create_app({"KINSCOPE_DB": db, "KINSCOPE_TOKEN": token, "KINSCOPE_LISTEN": host, "KINSCOPE_PORT": port,
                      "KINSCOPE_ALLOW_HOSTS": tuple(allow_hosts)})
    quiet_routine_logs()
    limit_malloc_arenas()
    try:
        server = create_server(app, host=host, port=port, threads=threads, ident="kinscope",
                               clear_untrusted_proxy_headers=True)
    except OSError as exc:
        if exc.errno == errno.EADDRINUSE:
            raise PortBusy(f"port {port} on {host} is busy (another program, or a kinscope already serving, "
                           "listens there); pick another with --port N") from None
        if exc.errno == errno.EACCES:
            raise PortBusy(f"port {port} on {host} needs privileges this user lacks; pick another with --port N "
                           "(1024 or above)") from None
        raise ServeError(f"cannot listen on {host}:{port}: {exc.strerror or exc}") from None
    holder: Holder = app.extensions["kinscope"]
    server.kinscope = holder  # for warm() and warm_explanations_later()
    return server


def warm(server) -> dict:
    """Load and run the query model once, and read the default layer's store, so that the first search
    waits for no model: {engine, seconds}, or {error, seconds} (the page still serves; searches say why)."""
    return server.kinscope.warm()


def warm_explanations_later(server) -> None:
    """Torch, which only explanations need, loaded in a background thread; a search asked while it loads
    can wait a few tenths of a second for Python's interpreter lock (docs/benchmarks.md)."""
    server.kinscope.warm_explanations_later()


def serve(db: str, host: str, port: int, token: str | None, threads: int = THREADS,
          allow_hosts: tuple[str, ...] = (), announce: Callable[[dict], None] | None = None,
          warm_explanations: bool = True) -> None:
    """Serve the page until stopped: bind (PortBusy first), warm the query model, `announce(ready)`, then
    load torch for explanations in the background while serving."""
    server = bind(db, host, port, token, threads, allow_hosts)
    ready = warm(server)
    if announce is not None:
        announce(ready)
    if warm_explanations:
        warm_explanations_later(server)
    try:
        server.run()
    finally:
        server.close()
