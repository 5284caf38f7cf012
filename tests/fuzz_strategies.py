"""Hypothesis strategies for hostile runs: CSV files, manifests, file names and archives that are
nearly right, plainly wrong, or damaged in transit. Shared by the fuzz tests and the long fuzz
benchmark (``benchmarks/fuzz_uploads.py``)."""

from __future__ import annotations

import io
import tarfile
import zipfile

from hypothesis import strategies as hs

from tests.service_support import small_run_files

RUN_TOML, SWEEP = (data for _, data in small_run_files())

KNOWN_KEYS = [
    "junctions_in_series", "parallel_rows", "excitation_rms_V", "series_resistance_ohm",
    "ground_capacitance_ratio", "sensor_resistance_ohm", "sweep_started", "sweep_ended",
    "bath_temperature_K", "device", "note", "frequency_Hz", "unknown_key", "", " ",
    "junctions_in_serie", "pump_frequency_Hz",
]
COLUMNS = ["bias_V", "conductance_S", "current_A", "time_s", "pump_on", "gate_V",
           "resistance_ohm", "conductance_uncertainty_S", "bias_mV", "", "x", "bias_V"]
NUMBERS = hs.one_of(
    hs.floats(allow_nan=True, allow_infinity=True).map(repr),
    hs.integers(min_value=-(2**70), max_value=2**70).map(str),
    hs.sampled_from(["", "1e-3", "1e400", "-0", "nan", "１２", "0x10", "1,5", " 3 ", "4e-06",
                     "2026-11-24T13:00:00Z", "yesterday", "9999-99-99", "\u00a0", "1_000"]),
    hs.text(max_size=12),
)


@hs.composite
def csv_files(draw) -> bytes:
    lines = []
    for _ in range(draw(hs.integers(0, 5))):
        key = draw(hs.sampled_from(KNOWN_KEYS) | hs.text(max_size=10))
        lines.append(f"# {key}: {draw(NUMBERS)}")
    header = draw(hs.lists(hs.sampled_from(COLUMNS) | hs.text(max_size=8), min_size=0, max_size=4))
    lines.append(",".join(header))
    width = len(header)
    rows = draw(hs.integers(0, 45))
    for _ in range(rows):
        cells = draw(hs.lists(NUMBERS, min_size=max(0, width - 1), max_size=width + 1))
        lines.append(",".join(cells))
    separator = draw(hs.sampled_from(["\n", "\r\n", "\r"]))
    text = separator.join(lines)
    encoding = draw(hs.sampled_from(["utf-8", "utf-8-sig", "utf-16", "latin-1"]))
    try:
        data = text.encode(encoding)
    except UnicodeEncodeError:
        data = text.encode("utf-8", "surrogatepass") if False else text.encode("utf-8", "replace")
    if draw(hs.booleans()) and data:
        at = draw(hs.integers(0, len(data) - 1))
        data = data[:at] + draw(hs.binary(max_size=8)) + data[at + 1 :]
    return data


@hs.composite
def manifests(draw) -> bytes:
    choice = draw(hs.integers(0, 4))
    if choice == 0:
        return RUN_TOML
    if choice == 1:
        return draw(hs.binary(max_size=200))
    if choice == 2:
        seed = draw(hs.integers(-(2**70), 2**70) | hs.sampled_from(["1.5", '"7"', "true"]))
        return RUN_TOML.replace(b"seed = 424242", f"seed = {seed}".encode())
    if choice == 3:
        section = draw(hs.sampled_from(["run", "item", "dates", "bogus", "sweeps", "pump"]))
        key = draw(hs.text(alphabet="abcdefghij_", min_size=1, max_size=8))
        value = draw(hs.sampled_from(['"x"', "1", "[1, 2]", "{a = 1}", "1979-05-27", "inf"]))
        return RUN_TOML + f"\n[{section}]\n{key} = {value}\n".encode()
    return RUN_TOML.replace(b'"cbt_thermometry"', draw(hs.sampled_from(
        [b'"pump_verification"', b'"sensor_calibration"', b'"nonsense"', b"3"])))


FILE_NAMES = hs.one_of(
    hs.sampled_from(["sweep.csv", "run.toml", "a.csv", "../x.csv", "/abs.csv", "a/b.csv",
                     "notes.txt", "s" * 300 + ".csv", "ü.csv", "a.csv/b.csv", "CON.csv", ".csv",
                     "x\\y.csv", "run.TOML", "sweep.CSV", " .csv"]),
    hs.text(min_size=1, max_size=20).map(lambda s: s + ".csv"),
)


@hs.composite
def plain_uploads(draw) -> list[tuple[str, bytes]]:
    files = []
    if draw(hs.booleans()):
        files.append(("run.toml", draw(manifests())))
    for _ in range(draw(hs.integers(0, 3))):
        content = draw(hs.sampled_from([SWEEP]) | csv_files())
        files.append((draw(FILE_NAMES), content))
    return files


def _zip(members: list[tuple[str, bytes]], method: int) -> bytes:
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w", compression=method) as archive:
        for name, data in members:
            archive.writestr(name, data)
    return buffer.getvalue()


def _tar(members: list[tuple[str, bytes]], mode: str) -> bytes:
    buffer = io.BytesIO()
    with tarfile.open(fileobj=buffer, mode=mode) as archive:
        for name, data in members:
            info = tarfile.TarInfo(name)
            info.size = len(data)
            archive.addfile(info, io.BytesIO(data))
    return buffer.getvalue()


@hs.composite
def archive_uploads(draw) -> list[tuple[str, bytes]]:
    members = draw(plain_uploads())
    folder = draw(hs.sampled_from(["", "run/", "a/b/"]))
    members = [(folder + name, data) for name, data in members]
    kind = draw(hs.sampled_from(["zip-stored", "zip-deflated", "tar", "tar.gz", "tar.xz"]))
    try:
        if kind.startswith("zip"):
            method = zipfile.ZIP_STORED if kind == "zip-stored" else zipfile.ZIP_DEFLATED
            data, name = _zip(members, method), "run.zip"
        else:
            mode = {"tar": "w", "tar.gz": "w:gz", "tar.xz": "w:xz"}[kind]
            data, name = _tar(members, mode), "run." + kind
    except (ValueError, UnicodeEncodeError):
        data, name = b"", "run.zip"
    damage = draw(hs.sampled_from(["none", "flip", "truncate", "splice"]))
    if data and damage == "flip":
        at = draw(hs.integers(0, len(data) - 1))
        data = data[:at] + bytes([data[at] ^ draw(hs.integers(1, 255))]) + data[at + 1 :]
    elif data and damage == "truncate":
        data = data[: draw(hs.integers(0, len(data) - 1))]
    elif data and damage == "splice":
        at = draw(hs.integers(0, len(data)))
        data = data[:at] + draw(hs.binary(min_size=1, max_size=32)) + data[at:]
    return [(name, data)]


UPLOADS = hs.one_of(plain_uploads(), archive_uploads())
SEEDS = hs.one_of(hs.none(), hs.integers(-(2**70), 2**70).map(str),
                  hs.sampled_from(["", " ", "１２３", "1e3", "0x1f", "七"]), hs.text(max_size=6))
