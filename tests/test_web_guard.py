"""What a web page in the user's own browser can make of the server: foreign Host names (DNS rebinding)
and requests from other origins get nothing. Flask's test client, headers set as browsers set them
(Fetch Metadata: W3C "Fetch Metadata Request Headers"; Origin: RFC 6454; 421: RFC 9110 section 15.5.20)."""
from __future__ import annotations

import io

import pytest
from PIL import Image

from web import create_app
from web.guard import HostRule, split_host

PORT = 8470
OWN = {"Host": f"127.0.0.1:{PORT}"}


@pytest.fixture(scope="module")
def app(sample_archive):
    archive, _ = sample_archive
    return create_app({"KINSCOPE_DB": str(archive.db), "TESTING": True, "KINSCOPE_PORT": PORT,
                       "KINSCOPE_LISTEN": "127.0.0.1", "KINSCOPE_ALLOW_HOSTS": ("photos.lan",)})


@pytest.fixture(scope="module")
def item_id(app):
    return app.test_client().get("/api/items?limit=1", headers=OWN).get_json()["items"][0]["id"]


def _jpeg() -> bytes:
    buf = io.BytesIO()
    Image.new("RGB", (64, 48), (200, 40, 90)).save(buf, "JPEG")
    return buf.getvalue()


def _post(client, url="/api/queries", headers=OWN):
    return client.post(url, headers=headers, data={"file": (io.BytesIO(_jpeg()), "q.jpg")},
                       content_type="multipart/form-data")


def _reads(item_id: int) -> list[str]:
    return ["/", "/api/info", "/api/items?limit=5", f"/api/items/{item_id}", f"/media/items/{item_id}/image",
            f"/media/items/{item_id}/thumbnail", f"/api/search?item={item_id}&k=3"]


@pytest.mark.parametrize("host", ["127.0.0.1:8470", "localhost:8470", "[::1]:8470", "LOCALHOST:8470",
                                  "photos.lan", "photos.lan:443"])
def test_the_names_it_was_started_for_are_answered(app, item_id, host):
    r = app.test_client().get(f"/api/items/{item_id}", headers={"Host": host})
    assert r.status_code == 200 and r.get_json()["path"]


@pytest.mark.parametrize("host", ["attacker.example", "attacker.example:8470", "127.0.0.1.attacker.example:8470",
                                  "127.0.0.1:9999", "localhost", "127.0.0.2:8470", "[::1", "::1", "", "a b:8470"])
def test_a_foreign_host_gets_nothing(app, item_id, host):
    c = app.test_client()
    path = c.get(f"/api/items/{item_id}", headers=OWN).get_json()["path"]
    for url in _reads(item_id):
        r = c.get(url, headers={"Host": host})
        assert r.status_code == 421, (url, r.status_code)
        assert path.encode() not in r.data and b"JFIF" not in r.data and r.mimetype != "image/jpeg"
        assert r.headers["Cross-Origin-Resource-Policy"] == "same-origin"
    r = _post(c, headers={"Host": host})
    assert r.status_code == 421 and "does not answer to the name" in r.get_json()["error"]


@pytest.mark.parametrize("headers", [
    {"Origin": "http://attacker.example"},
    {"Origin": "null"},  # sandboxed frames, file:// pages
    {"Origin": "http://127.0.0.1:9000"},  # another server on this machine
    {"Origin": "http://localhost:8470"},  # the same server by another name is another origin
    {"Sec-Fetch-Site": "cross-site", "Sec-Fetch-Mode": "no-cors", "Sec-Fetch-Dest": "empty"},
    {"Sec-Fetch-Site": "same-site", "Sec-Fetch-Mode": "no-cors", "Sec-Fetch-Dest": "empty"},
    {"Sec-Fetch-Site": "cross-site", "Sec-Fetch-Mode": "navigate", "Sec-Fetch-Dest": "document"},  # a form post
])
def test_uploads_from_another_origin_are_refused(app, headers):
    c = app.test_client()
    for url in ("/api/queries", "/api/search?k=3"):
        r = _post(c, url, {**OWN, **headers})
        assert r.status_code == 403, (url, headers)
        assert "another web site or origin" in r.get_json()["error"]


@pytest.mark.parametrize("headers", [
    {},  # scripts and older browsers send neither header
    {"Origin": "http://127.0.0.1:8470", "Sec-Fetch-Site": "same-origin", "Sec-Fetch-Mode": "cors"},  # the page
    {"Origin": "https://127.0.0.1:8470"},  # the page behind a TLS-terminating proxy
    {"Sec-Fetch-Site": "none"},  # typed by the user
])
def test_uploads_from_the_page_itself_are_kept(app, headers):
    r = _post(app.test_client(), headers={**OWN, **headers})
    assert r.status_code == 201 and r.get_json()["upload"].startswith("q")


@pytest.mark.parametrize("headers, status", [
    ({"Sec-Fetch-Site": "cross-site", "Sec-Fetch-Mode": "no-cors", "Sec-Fetch-Dest": "image"}, 403),  # <img>
    ({"Sec-Fetch-Site": "cross-site", "Sec-Fetch-Mode": "cors", "Origin": "http://attacker.example"}, 403),  # fetch
    ({"Origin": "http://attacker.example"}, 403),
    ({"Sec-Fetch-Site": "cross-site", "Sec-Fetch-Mode": "navigate", "Sec-Fetch-Dest": "iframe"}, 403),
    ({"Sec-Fetch-Site": "same-site", "Sec-Fetch-Mode": "no-cors", "Sec-Fetch-Dest": "script"}, 403),
    ({"Sec-Fetch-Site": "cross-site", "Sec-Fetch-Mode": "navigate", "Sec-Fetch-Dest": "document"}, 200),  # a link
    ({"Sec-Fetch-Site": "same-origin", "Sec-Fetch-Mode": "no-cors", "Sec-Fetch-Dest": "image"}, 200),
])
def test_reads_labelled_as_from_another_site_are_refused_except_a_link(app, item_id, headers, status):
    c = app.test_client()
    for url in _reads(item_id):
        r = c.get(url, headers={**OWN, **headers})
        assert r.status_code == status, (url, headers)
        if status == 403:
            assert r.mimetype != "image/jpeg" and b"items" not in r.data


def test_a_get_carrying_a_body_counts_as_an_upload(app):
    r = app.test_client().get("/api/search?k=3", headers={**OWN, "Origin": "http://attacker.example"},
                              data={"file": (io.BytesIO(_jpeg()), "q.jpg")}, content_type="multipart/form-data")
    assert r.status_code == 403


def test_host_rule_for_a_server_on_every_address():
    rule = HostRule("0.0.0.0", 8470, ("photos.lan",))
    assert rule.allows("192.0.2.7:8470") and rule.allows("[2001:db8::1]:8470") and rule.allows("photos.lan")
    assert not rule.allows("attacker.example:8470") and not rule.allows("192.0.2.7:9999")
    assert not rule.allows("0.0.0.0.attacker.example:8470")
    # An app made without a port (the test client's "localhost") accepts loopback names on any port.
    free = HostRule("127.0.0.1", None)
    assert free.allows("localhost") and free.allows("127.0.0.1:1234") and not free.allows("attacker.example")


@pytest.mark.parametrize("value, parsed", [
    ("127.0.0.1:8470", ("127.0.0.1", 8470)), ("[::1]:8470", ("::1", 8470)), ("[::1]", ("::1", None)),
    ("Photos.LAN.", ("photos.lan", None)), ("::1", None), ("host:port", None), ("host:123456", None), ("[::1]x", None),
])
def test_host_headers_are_parsed_strictly(value, parsed):
    assert split_host(value) == parsed


def test_allow_host_names_are_checked_by_the_cli(sample_archive):
    from click.testing import CliRunner

    from index.cli import main

    archive, _ = sample_archive
    for bad in ("http://photos.lan", "photos.lan:8443", "*", "*.lan"):
        out = CliRunner().invoke(main, ["serve", "--db", str(archive.db), "--allow-host", bad])
        assert out.exit_code == 2 and "--allow-host takes a host name" in out.output, out.output
