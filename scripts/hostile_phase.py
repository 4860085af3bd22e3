"""The load test's hostile phase: what a web page open in the user's browser could try on the server.

Each attack is sent as a browser would label it (Host, Origin, Sec-Fetch-* headers); the phase
counts what got through (any 2xx or 3xx answer) and measures the server's resident memory while
it is flooded with the largest uploads it accepts. Run through scripts/load_test.py.
"""
from __future__ import annotations

import io
import json
import threading
import time
import uuid

import numpy as np
from PIL import Image

from load_test import get, rss_mb

REBOUND = ("attacker.example", "attacker.example:{port}", "127.0.0.1.attacker.example:{port}")


def multipart(data: bytes) -> tuple[bytes, dict]:
    boundary = uuid.uuid4().hex
    body = (f'--{boundary}\r\nContent-Disposition: form-data; name="file"; filename="q"\r\n'
            "Content-Type: application/octet-stream\r\n\r\n").encode() + data + f"\r\n--{boundary}--\r\n".encode()
    return body, {"Content-Type": f"multipart/form-data; boundary={boundary}"}


def upload(base: str, data: bytes, headers: dict | None = None, path: str = "/api/queries") -> tuple[int, bytes]:
    body, h = multipart(data)
    return get(base + path, timeout=300, headers={**h, **(headers or {})}, data=body)


def large(fmt: str, side: int, **save) -> bytes:
    """A photo-sized image that compresses under the 32 MB upload limit (generated)."""
    rng = np.random.default_rng(side)
    image = Image.fromarray(rng.integers(0, 255, (24, 24, 3), dtype=np.uint8)).resize((side, side), Image.BILINEAR)
    buf = io.BytesIO()
    image.save(buf, fmt, **save)
    return buf.getvalue()


def declared(side: int) -> bytes:
    """A tiny JPEG whose frame header (ITU-T T.81 B.2.2, SOF0) declares side x side pixels."""
    buf = io.BytesIO()
    Image.new("RGB", (64, 48), (10, 120, 200)).save(buf, "JPEG")
    data = bytearray(buf.getvalue())
    sof = data.index(b"\xff\xc0")
    data[sof + 5:sof + 9] = side.to_bytes(2, "big") * 2
    return bytes(data)


def foreign_host(base: str, port: int, item: int) -> tuple[str, int, int]:
    reads = ["/", "/api/info", "/api/items?limit=500", f"/api/items/{item}", f"/media/items/{item}/image",
             f"/media/items/{item}/thumbnail", f"/api/search?item={item}&k=3"]
    tried = through = 0
    for host in (h.format(port=port) for h in REBOUND):
        for path in reads:
            tried += 1
            through += get(base + path, headers={"Host": host})[0] < 400
        tried += 1
        through += upload(base, declared(64), {"Host": host})[0] < 400
    return "foreign Host (DNS rebinding): every read and an upload", tried, through


def foreign_origin(base: str, port: int, item: int, jpeg: bytes) -> list[tuple[str, int, int]]:
    writes = [{"Origin": "http://attacker.example"}, {"Origin": "null"}, {"Origin": f"http://127.0.0.1:{port + 1}"},
              {"Sec-Fetch-Site": "cross-site", "Sec-Fetch-Mode": "navigate", "Sec-Fetch-Dest": "document"},
              {"Sec-Fetch-Site": "same-site", "Sec-Fetch-Mode": "no-cors", "Sec-Fetch-Dest": "empty"}]
    w_through = sum(upload(base, jpeg, h, path)[0] < 400 for h in writes for path in ("/api/queries", "/api/search"))
    reads = [(f"/media/items/{item}/image", {"Sec-Fetch-Site": "cross-site", "Sec-Fetch-Mode": "no-cors",
                                               "Sec-Fetch-Dest": "image"}),
             ("/api/items?limit=500", {"Sec-Fetch-Site": "cross-site", "Sec-Fetch-Mode": "cors",
                                       "Origin": "http://attacker.example"}),
             (f"/api/explain?item={item}&match={item}", {"Sec-Fetch-Site": "same-site", "Sec-Fetch-Mode": "no-cors",
                                                         "Sec-Fetch-Dest": "script"})]
    r_through = sum(get(base + path, headers=h)[0] < 400 for path, h in reads)
    return [("foreign Origin / Sec-Fetch-Site: uploads and searches", 2 * len(writes), w_through),
            ("foreign Sec-Fetch-Site: <img>, fetch, <script> reads", len(reads), r_through)]


def oversized(base: str) -> list[tuple[str, int, int]]:
    rows = []
    for label, data in (("upload declaring 9000 x 9000 pixels (limit 60 M)", declared(9000)),
                        ("upload body of 33 MB (limit 32 MB)", b"\xff" * (33 * 2**20))):
        t0 = time.perf_counter()
        status, body = upload(base, data)
        message = json.loads(body).get("error", "") if body.startswith(b"{") else ""
        print(f"  {label}: {status} in {time.perf_counter() - t0:.2f} s: {message}")
        rows.append((label, 1, int(status < 400)))
    return rows


def flood(base: str, pid: int, args) -> tuple[bool, float]:
    """args.uploads of a 7600 x 7600 JPEG and args.png_uploads of a 7745 x 7745 PNG (the largest
    sizes under the 60-megapixel limit), from 4 threads at once; returns (all kept, MB grown)."""
    jpeg, png = large("JPEG", 7600, quality=80), large("PNG", 7745, compress_level=1)
    plan = [png] * args.png_uploads + [jpeg] * args.uploads  # popped from the end: JPEGs first
    print(f"  flood: {args.uploads} x JPEG 7600 x 7600 ({len(jpeg) / 1e6:.1f} MB), then {args.png_uploads} x "
          f"PNG 7745 x 7745 ({len(png) / 1e6:.1f} MB), 4 clients at once")
    lock, statuses, tokens, peak = threading.Lock(), [], [], [0.0]
    stop_at = time.monotonic() + args.max_seconds

    def client() -> None:
        while time.monotonic() < stop_at:
            with lock:
                if not plan:
                    return
                data = plan.pop()
            status, body = upload(base, data)
            with lock:
                statuses.append(status)
                if status == 201:
                    tokens.append(json.loads(body)["upload"])

    before = rss_mb(pid)
    t0 = time.perf_counter()
    threads = [threading.Thread(target=client) for _ in range(4)]
    for t in threads:
        t.start()
    while any(t.is_alive() for t in threads):
        peak[0] = max(peak[0], rss_mb(pid))
        time.sleep(0.1)
    after = rss_mb(pid)
    last = get(f"{base}/api/search?upload={tokens[-1]}&k=3&box=0.1,0.1,0.5,0.5")[0] if tokens else None
    print(f"  {statuses.count(201)} of {len(statuses)} uploads kept in {time.perf_counter() - t0:.1f} s; "
          f"region search on the last one: {last}")
    print(f"  server resident memory: {before:.0f} MB before, peak {peak[0]:.0f} MB, {after:.0f} MB after "
          f"({after - before:+.0f} MB; target < +300 MB)")
    return statuses.count(201) == args.uploads + args.png_uploads and last == 200, after - before


def hostile_phase(base: str, port: int, pid: int, args) -> bool:
    item = json.loads(get(f"{base}/api/items?limit=1")[1])["items"][0]["id"]
    get(f"{base}/api/search?item={item}&k=3&box=0.1,0.1,0.9,0.9")  # loads the model, as on a page in use
    print("hostile phase")
    rows = [foreign_host(base, port, item), *foreign_origin(base, port, item, declared(64)), *oversized(base)]
    kept, grown = flood(base, pid, args)
    print(f"{'attack':<58} {'tried':>6} {'got through':>12}")
    for label, tried, through in rows:
        print(f"{label:<58} {tried:>6} {through:>12}")
    return kept and grown < 300 and not any(through for _, _, through in rows)
