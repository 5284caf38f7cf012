"""The certificate as one self-contained HTML page (plots inline as SVG), from the record's data.

The content is :func:`service.render.content.certificate_blocks`; the markup is the template
``templates/certificate.html``.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from service.render.content import certificate_blocks
from service.render.environment import environment


def render_html(record: Mapping[str, Any], plots: Mapping[str, str] | None = None,
                seal: Mapping[str, Any] | None = None) -> str:
    """The HTML page of a record, lifecycle notices (amended, superseded, withdrawn) included;
    ``seal`` adds the signature details of an issued certificate."""
    return environment().get_template("certificate.html").render(
        title=record.get("title", "Calibration certificate"),
        certificate_id=record.get("certificate_id", "unnumbered"),
        blocks=certificate_blocks(record, plots, seal),
    )
