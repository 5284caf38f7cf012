"""``coldcert sensor-temperatures``: a fridge log converted with a sensor-calibration certificate."""

from __future__ import annotations

import math
from pathlib import Path


def add_commands(sub) -> None:
    """Register ``coldcert sensor-temperatures``."""
    p = sub.add_parser(
        "sensor-temperatures",
        help="convert a fridge-sensor resistance log to temperatures with a calibration certificate",
    )
    p.add_argument("certificate", help="certificate.json of a sensor calibration (or its folder)")
    p.add_argument("log", help="CSV with a resistance_ohm column (other columns are copied)")
    p.add_argument("--out", required=True, help="CSV file to write")
    p.add_argument(
        "--reading-relative-u",
        type=float,
        default=0.0,
        help="relative standard uncertainty of each resistance reading (default 0)",
    )
    p.add_argument(
        "--skip-out-of-range",
        action="store_true",
        help="leave readings outside the calibrated range empty instead of refusing the log",
    )
    p.set_defaults(handler=cmd_sensor_temperatures)


def cmd_sensor_temperatures(args) -> int:
    from service.calibrations.sensor import CertificateError, convert_log, load_certificate
    from service.cli.main import CommandError
    from service.cli.run_commands import write_atomically
    from service.intake import IntakeError, parse_csv

    if not (math.isfinite(args.reading_relative_u) and 0 <= args.reading_relative_u < 1):
        raise CommandError("--reading-relative-u must be a number in [0, 1)")
    try:
        record = load_certificate(args.certificate)
        log_path = Path(args.log)
        try:
            raw = log_path.read_bytes()
        except OSError as exc:
            raise CommandError(f"{log_path}: cannot read ({exc.strerror})") from None
        log = parse_csv(log_path.name, raw)
        csv, n_in, n_out = convert_log(
            record,
            log,
            reading_relative_u=args.reading_relative_u,
            skip_out_of_range=args.skip_out_of_range,
            source=str(args.certificate),
        )
    except IntakeError as exc:
        raise CommandError(exc.describe()) from None
    except CertificateError as exc:
        raise CommandError(str(exc)) from None
    out = Path(args.out)
    write_atomically(out.parent if str(out.parent) else Path("."), {out.name: csv})
    msg = f"{n_in} reading(s) converted to {out}"
    if n_out:
        msg += f"; {n_out} outside the calibrated range left empty"
    print(msg)
    return 0
