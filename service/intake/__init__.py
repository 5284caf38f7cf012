"""Intake: run folders and uploads to validated arrays, or an IntakeError naming file, line, field.

``core`` reads CSV files and run.toml; ``table`` is the fixed table of metadata keys and manifest
fields per calibration kind; ``pump_files`` checks pump records and scans. Everything short of
fitting is checked here, so ``coldcert check`` refuses what ``certify`` would refuse.
"""

from service.intake.core import (
    DataFile,
    IntakeError,
    Run,
    check_cbt_sweep,
    check_file_rules,
    check_manifest,
    conductance_from_iv,
    detect_kind,
    is_cbt_sweep,
    load_files,
    load_run,
    manifest_field,
    manifest_number,
    parse_csv,
    parse_manifest,
)
from service.intake.table import (
    KIND_CBT,
    KIND_PUMP,
    KIND_SENSOR,
    KINDS,
    METADATA_KEYS,
    KeySpec,
    integer_parser,
    iso_datetime,
    real_parser,
)

__all__ = [
    "DataFile",
    "IntakeError",
    "KINDS",
    "KIND_CBT",
    "KIND_PUMP",
    "KIND_SENSOR",
    "KeySpec",
    "METADATA_KEYS",
    "Run",
    "check_cbt_sweep",
    "check_file_rules",
    "check_manifest",
    "conductance_from_iv",
    "detect_kind",
    "integer_parser",
    "is_cbt_sweep",
    "iso_datetime",
    "load_files",
    "load_run",
    "manifest_field",
    "manifest_number",
    "parse_csv",
    "parse_manifest",
    "real_parser",
]
