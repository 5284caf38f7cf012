"""Behind a reverse proxy: one setting names the proxy, and only its forwarded headers count.

`coldcert serve` runs waitress, which believes X-Forwarded-For/-Proto/-Host only from the address
in ``TRUSTED_PROXY`` (or ``--proxy``) and removes them from anyone else; werkzeug's ProxyFix
(``TRUSTED_PROXIES``, a count) is for other WSGI servers, and setting both is refused because the
headers would then be applied twice. What is checked here is the consequence a lab relies on: a
session cookie is marked Secure when TLS ends at the trusted proxy, and a client talking to the
server directly cannot obtain that by sending the header itself.
"""

from __future__ import annotations

import urllib.request

import pytest

from service.web.app import create_app
from tests.service_support import LiveServer, make_lab


def _login_cookie(server: LiveServer) -> str:
    request = urllib.request.Request(
        server.url + "/login", headers={"X-Forwarded-Proto": "https"}
    )
    with urllib.request.urlopen(request, timeout=30) as reply:
        return " ".join(reply.headers.get_all("Set-Cookie") or [])


@pytest.mark.parametrize(
    ("proxy", "secure"),
    [("127.0.0.1", True), ("192.0.2.7", False), (None, False)],  # 192.0.2.0/24: TEST-NET-1, RFC 5737
)
def test_forwarded_headers_count_only_from_the_named_proxy(tmp_path, proxy, secure):
    lab = make_lab(tmp_path)
    with LiveServer(lab.app, proxy=proxy) as server:
        cookie = _login_cookie(server)
    lab.services.storage.dispose()
    assert cookie.startswith("session=")
    assert ("Secure" in cookie) is secure


def test_two_proxy_settings_are_refused(tmp_path):
    with pytest.raises(ValueError, match="TRUSTED_PROXY .* TRUSTED_PROXIES .* set only one"):
        create_app(
            {"INSTANCE_PATH": str(tmp_path / "instance"), "TRUSTED_PROXY": "127.0.0.1",
             "TRUSTED_PROXIES": 1}
        )
    assert not (tmp_path / "instance" / "coldcert.sqlite3").exists()
