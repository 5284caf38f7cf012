"""The calibration kinds this version can certify, listed explicitly.

Each kind is a module in ``service.calibrations`` with the same small interface:
``analyse(run, seed, progress=None, fast=False) -> CalibrationOutcome``, raising
``IntakeError`` for input it cannot use and ``CertificationRefused`` for a result that must not
go on a certificate. Adding a kind means writing such a module and listing it here.
"""

from __future__ import annotations

from collections.abc import Callable
from types import ModuleType

from service.intake import KIND_CBT, KIND_PUMP, KIND_SENSOR


def _cbt() -> ModuleType:
    from service.calibrations import cbt

    return cbt


def _sensor() -> ModuleType:
    from service.calibrations import sensor

    return sensor


def _pump() -> ModuleType:
    from service.calibrations import pump

    return pump


#: Run kind -> loader of its calibration module. The loaders import on first use so that a
#: command handling one kind does not pay for importing the science of the others.
CALIBRATIONS: dict[str, Callable[[], ModuleType]] = {
    KIND_CBT: _cbt,
    KIND_SENSOR: _sensor,
    KIND_PUMP: _pump,
}


def calibration_for(kind: str) -> ModuleType:
    """The calibration module for a run kind; NotImplementedError for a kind this version lacks."""
    try:
        loader = CALIBRATIONS[kind]
    except KeyError:
        raise NotImplementedError(f"runs of kind {kind!r} are not supported by this version") from None
    return loader()
