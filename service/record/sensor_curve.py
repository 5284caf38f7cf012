"""A sensor-calibration curve in the certificate record and back: the record keeps everything
needed to rebuild the curve for secondary use (converting a fridge log, comparing calibrations
of one sensor over the years)."""

from __future__ import annotations

import math

import numpy as np

from analysis import sensors


def curve_record(curve: sensors.CalibrationCurve) -> dict:
    """The curve as plain data: everything needed to rebuild it for secondary use."""
    return {
        "form": "ln(T/K) = sum_j c_j T_j(x), x = [2 ln R - (ln R_max + ln R_min)] / (ln R_max - ln R_min)",
        "basis": "Chebyshev polynomials of the first kind (numpy.polynomial.chebyshev)",
        "degree": curve.degree,
        "coefficients": [float(c) for c in curve.coefficients],
        "ln_resistance_min": curve.ln_resistance_min,
        "ln_resistance_max": curve.ln_resistance_max,
        "covariance": curve.covariance.tolist(),
        "covariance_parts": [
            {
                "name": p.name,
                "type": p.kind,
                "degrees_of_freedom": None
                if math.isinf(p.degrees_of_freedom)
                else p.degrees_of_freedom,
                "correlated_across_points": p.correlated_across_points,
                "note": p.note,
                "covariance": p.covariance.tolist(),
            }
            for p in curve.covariance_parts
        ],
    }


class CertificateError(ValueError):
    """A certificate that does not hold a usable sensor calibration curve."""


def curve_from_record(record: dict, source: str = "certificate.json") -> sensors.CalibrationCurve:
    """Rebuild the calibration curve stored in a sensor-calibration certificate record."""
    if record.get("job") != "sensor_calibration":
        raise CertificateError(
            f"{source}: this certificate is for job {record.get('job')!r}, not a sensor calibration"
        )
    try:
        c = record["sections"]["sensor_calibration"]["curve"]
        parts = tuple(
            sensors.CovariancePart(
                name=p["name"],
                covariance=np.array(p["covariance"], dtype=float),
                kind=p["type"],
                degrees_of_freedom=math.inf
                if p["degrees_of_freedom"] is None
                else float(p["degrees_of_freedom"]),
                correlated_across_points=bool(p["correlated_across_points"]),
                note=p.get("note", ""),
            )
            for p in c["covariance_parts"]
        )
        return sensors.CalibrationCurve(
            np.array(c["coefficients"], dtype=float),
            float(c["ln_resistance_min"]),
            float(c["ln_resistance_max"]),
            parts,
        )
    except (KeyError, TypeError, ValueError) as exc:
        raise CertificateError(
            f"{source}: the sensor-calibration curve is missing or malformed ({exc})"
        ) from None
