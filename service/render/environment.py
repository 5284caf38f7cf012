"""The one Jinja environment for certificate renderings: autoescaping on, usable without Flask.

Templates live in ``service/render/templates``. Flask is not needed: the CLI renders the same
templates offline. Every value is escaped unless a template marks it safe; only plot SVG, which
our own plotting code writes and the archive checks against the signed entry, is marked so.
"""

from __future__ import annotations

from functools import cache

from jinja2 import Environment, PackageLoader, StrictUndefined, select_autoescape


@cache
def environment() -> Environment:
    """The shared environment (built once): HTML and XML templates are autoescaped."""
    return Environment(
        loader=PackageLoader("service.render", "templates"),
        autoescape=select_autoescape(["html", "xml"], default_for_string=True, default=True),
        undefined=StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
        keep_trailing_newline=True,
    )
