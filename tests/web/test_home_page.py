"""The home page without a browser: a unit without a model says why, stale data is marked,
the wall screen's interval is bounded, and Plotly's JavaScript is served compressed.

References: RFC 9110 section 12.5.3 (Accept-Encoding; "q=0" means "not acceptable") and the
decoders of the Python standard library (gzip) and of the Brotli format's reference library
(``brotli``, RFC 7932), which must give back the installed file byte for byte.
"""

from __future__ import annotations

import gzip
import re
from collections.abc import Iterator

import brotli
import pytest
from fastapi.testclient import TestClient

from app.config import get_settings
from app.web.app import create_app
from app.web.vendor import PLOTLY_JS, choose
from tests.security.fixtures import acting_as

DEMO_MORNING = "2026-11-30T08:00:00+00:00"  # the demo's last census morning (as generated)


@pytest.fixture
def at(monkeypatch: pytest.MonkeyPatch) -> Iterator[object]:
    def fix(now: str) -> None:
        monkeypatch.setenv("MORROW_TIMEZONE", "UTC")
        monkeypatch.setenv("MORROW_NOW", now)
        get_settings.cache_clear()

    yield fix
    get_settings.cache_clear()


def _client(url: str) -> TestClient:
    app = create_app(url)
    acting_as(app, "viewer")
    return TestClient(app)


def test_units_without_a_model_say_why_and_fresh_data_is_not_marked(demo_db: str, at) -> None:
    at(DEMO_MORNING)
    page = _client(demo_db).get("/")
    assert page.status_code == 200
    # The demo database of the tests has no trained model: each row says so, in words.
    assert len(re.findall(r'class="no-forecast"><strong>No forecast:</strong>', page.text)) == 2
    assert 'id="stale"' not in page.text
    assert "do not replace" in page.text


def test_the_wall_screen_marks_stale_data_and_reloads_itself(demo_db: str, at) -> None:
    at("2026-12-02T12:00:00+00:00")  # 52 hours after the demo's last census
    page = _client(demo_db).get("/wall")
    assert page.status_code == 200
    assert 'id="stale"' in page.text
    assert re.search(r"KV-CRIT's latest census is 52 hours old", page.text)
    assert page.headers["Refresh"] == "300"
    assert "Page refreshed at" in page.text


def test_the_wall_screens_interval_is_bounded(demo_db: str, at) -> None:
    at(DEMO_MORNING)
    client = _client(demo_db)
    assert client.get("/wall?refresh=4").status_code == 422
    assert client.get("/wall?refresh=3601").status_code == 422
    assert client.get("/wall?refresh=5").headers["Refresh"] == "5"


@pytest.mark.parametrize(("header", "coding"), [
    ("gzip, deflate, br, zstd", "br"), ("gzip, deflate", "gzip"), ("br;q=0, gzip", "gzip"),
    ("identity", "identity"), ("", "identity"), ("*", "gzip"), ("BR", "br")])
def test_the_encoding_follows_accept_encoding(header: str, coding: str) -> None:
    assert choose(header) == coding


def test_plotly_is_served_compressed_and_decodes_to_the_installed_file(db_url: str) -> None:
    client = TestClient(create_app(db_url))
    raw = PLOTLY_JS.read_bytes()
    br = client.get("/vendor/plotly.min.js", headers={"Accept-Encoding": "br"})
    assert br.headers["content-encoding"] == "br"
    assert br.headers["vary"] == "Accept-Encoding"
    # httpx2 decodes the body; the bytes on the wire are the compressed ones.
    assert int(br.headers["content-length"]) < 1_300_000 < len(raw)
    assert br.content == raw
    gz = client.get("/vendor/plotly.min.js", headers={"Accept-Encoding": "gzip"})
    assert gz.headers["content-encoding"] == "gzip" and gz.content == raw
    assert int(gz.headers["content-length"]) < 1_500_000
    plain = client.get("/vendor/plotly.min.js", headers={"Accept-Encoding": "identity"})
    assert "content-encoding" not in plain.headers and plain.content == raw
    again = client.get("/vendor/plotly.min.js", headers={"Accept-Encoding": "br",
                                                         "If-None-Match": br.headers["etag"]})
    assert again.status_code == 304
    # The bytes on the wire, decoded by the standard decoders.
    for coding, decode in (("br", brotli.decompress), ("gzip", gzip.decompress)):
        with client.stream("GET", "/vendor/plotly.min.js",
                           headers={"Accept-Encoding": coding}) as response:
            wire = b"".join(response.iter_raw())
        assert len(wire) == int(response.headers["content-length"]) < len(raw)
        assert decode(wire) == raw
