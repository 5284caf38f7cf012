"""The production web server: waitress, a pure-Python WSGI server that runs the same on Linux and
Windows lab PCs. werkzeug's development server is used only when asked for explicitly."""

from __future__ import annotations

from typing import Any


def production_server(
    app: Any, host: str, port: int, threads: int = 8, proxy: str | None = None
) -> Any:
    """A waitress server for ``app``; call ``.run()`` to serve, ``.close()`` to stop.

    ``proxy`` is the address of a reverse proxy in front of this server: its X-Forwarded-For,
    -Proto and -Host headers are then trusted (so links and client addresses are right behind a
    TLS-terminating proxy), and the same headers from anyone else are removed.
    """
    from waitress import create_server

    options: dict[str, Any] = {
        "host": host,
        "port": port,
        "threads": max(1, int(threads)),
        "ident": "coldcert",
        # Uploads are whole run folders; Flask's MAX_CONTENT_LENGTH answers 413 above its limit,
        # so waitress must not cut the request off first.
        "max_request_body_size": int(app.config["MAX_CONTENT_LENGTH"]) + 1024 * 1024,
    }
    if proxy:
        options.update(
            trusted_proxy=proxy,
            trusted_proxy_headers={"x-forwarded-for", "x-forwarded-proto", "x-forwarded-host"},
            clear_untrusted_proxy_headers=True,
        )
    return create_server(app, **options)
