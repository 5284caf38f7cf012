"""Test-session settings.

BLAS thread pools are pinned to one thread: on a shared 2-core machine several OpenBLAS threads per
process fight for the cores and make small linear-algebra calls many times slower (common practice,
no source). This must happen before numpy is first imported, hence here.
"""

import os

for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")


import pytest  # noqa: E402

#: Environment variable naming the DCC 3.3.0 ``dcc.xsd`` (PTB's schema files are not part of the
#: repository). `.ci/run` sets it to its copy; a plain clone skips the schema checks.
DCC_SCHEMA_ENV = "COLDCERT_DCC_SCHEMA"


@pytest.fixture(scope="session")
def dcc_schema_path():
    """Path of the DCC 3.3.0 schema, or skip (fail under CI=true) when none is configured."""
    from pathlib import Path

    value = os.environ.get(DCC_SCHEMA_ENV)
    if value and Path(value).is_file():
        return Path(value)
    reason = (
        f"DCC 3.3.0 schema not configured: set {DCC_SCHEMA_ENV} to your copy of dcc.xsd"
        if not value
        else f"DCC 3.3.0 schema not found at {value} ({DCC_SCHEMA_ENV})"
    )
    if os.environ.get("CI") == "true":
        pytest.fail(reason + " (CI must supply it)")
    pytest.skip(reason)
