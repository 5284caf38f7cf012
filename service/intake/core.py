"""Intake: turn a run folder (CSV data files and an optional ``run.toml``) into validated arrays.

Everything a lab hands us passes through here. A file is accepted whole or refused with an
:class:`IntakeError` naming the file, the line and the field, and what was expected. Raw bytes are
kept unchanged beside the parsed arrays, with their SHA-256, so that the archive can store them
content-addressed and re-analyse them years later.

File format (docs/formats.md): optional ``# key: value`` metadata lines, then a header row whose
column names end in an SI unit (``bias_V``, ``conductance_S``, ``current_A``, ``gate_V``,
``time_s``, ``resistance_ohm``, ``pressure_Pa``), then comma-separated numbers.
"""

from __future__ import annotations

import difflib
import hashlib
import math
import re
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from service.intake.table import (
    KIND_CBT,
    KIND_PUMP,
    KIND_SENSOR,
    METADATA_KEYS,
    FieldError,
    check_manifest_fields,
    iso_datetime,
    manifest_value,
)

MIN_SWEEP_POINTS = 30
MAX_FILE_BYTES = 50 * 1024 * 1024



class IntakeError(ValueError):
    """Input that cannot be accepted. ``str()`` gives one line: file:line: field: message."""

    def __init__(self, message: str, file: str | None = None, line: int | None = None, field: str | None = None):
        self.message = message
        self.file = file
        self.line = line
        self.field = field
        super().__init__(self.describe())

    def __reduce__(self):
        # Raised in a worker process (parallel sweep fits) and re-raised in the caller: keep the
        # location fields, not only the joined message.
        return (type(self), (self.message, self.file, self.line, self.field))

    def describe(self) -> str:
        where = ""
        if self.file:
            where = self.file + (f":{self.line}" if self.line else "")
        parts = [p for p in (where, self.field) if p]
        return (": ".join(parts) + ": " if parts else "") + self.message

    def as_dict(self) -> dict:
        return {"file": self.file, "line": self.line, "field": self.field, "message": self.message}


#: Column names: a word (letters, digits, underscores) and an SI unit suffix. Which columns a
#: calibration uses is checked by its kind (e.g. a sweep needs bias_V and conductance_S), so any
#: name ending in a unit is accepted here (``G_S`` is then reported as "found G_S" by that check).
UNIT_SUFFIXES = ("V", "S", "A", "s", "ohm", "Pa", "K", "Hz", "T")
_COLUMN_RE = re.compile(r"^[A-Za-z][A-Za-z0-9_]*_(" + "|".join(UNIT_SUFFIXES) + r")$")
#: Columns that are legitimately dimensionless.
DIMENSIONLESS_COLUMNS = {"pump_on"}


# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class DataFile:
    """One accepted CSV file: its raw bytes, typed metadata and numeric columns."""

    name: str
    raw: bytes
    sha256: str
    metadata: dict
    metadata_lines: dict
    columns: dict[str, np.ndarray]
    header_line: int
    first_data_line: int
    free_text: dict = field(default_factory=dict)

    @property
    def rows(self) -> int:
        return next(iter(self.columns.values())).size if self.columns else 0

    def line_of_row(self, i: int) -> int:
        """Line number (1-based) of data row i, for error messages."""
        return self.first_data_line + i


@dataclass(frozen=True)
class Run:
    """A validated run: manifest, files and the job kind they describe."""

    path: str
    manifest: dict
    files: tuple[DataFile, ...]
    kind: str
    manifest_raw: bytes | None = None

    def file(self, name: str) -> DataFile:
        for f in self.files:
            if f.name == name:
                return f
        raise KeyError(name)


def sha256_hex(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


#: Separators people use instead of commas, by what we call them in a message.
_OTHER_SEPARATORS = {";": "semicolons", "\t": "tabs", "|": "vertical bars"}
#: SI prefixes a column unit might carry (refused: the columns are in unprefixed units).
_SI_PREFIXES = {
    "f": 1e-15, "p": 1e-12, "n": 1e-9, "u": 1e-6, "µ": 1e-6, "μ": 1e-6, "m": 1e-3,
    "k": 1e3, "M": 1e6, "G": 1e9,
}


def _is_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


def _column_problem(h: str) -> str | None:
    """Why ``h`` is not a valid column name, or None. Names ending in a unit are never refused
    for their unit; a prefixed unit (``bias_mV``) is refused with the unprefixed name to use."""
    if h in DIMENSIONLESS_COLUMNS or _COLUMN_RE.match(h):
        return None
    stem, _, unit = h.rpartition("_")
    if stem and unit in UNIT_SUFFIXES:
        return f"column name must be a word and its unit, e.g. bias_V, conductance_S (found {h!r})"
    for prefix, factor in _SI_PREFIXES.items():
        base = unit[len(prefix):]
        if stem and unit.startswith(prefix) and base in UNIT_SUFFIXES:
            return (
                f"unit {unit!r} has an SI prefix: give the column in {base} without a prefix "
                f"({stem}_{base}, values multiplied by {factor:g})"
            )
    return (
        "column name must end in an SI unit, e.g. bias_V, conductance_S, current_A "
        f"(units: {', '.join(UNIT_SUFFIXES)})"
    )


def _parse_header(name: str, line: str, header_line: int) -> list[str]:
    """The column names of the header row, or an error that says what is wrong with it."""
    if "," not in line:
        for sep, called in _OTHER_SEPARATORS.items():
            if sep in line:
                raise IntakeError(
                    f"the columns are separated by {called}; coldcert reads comma-separated "
                    "values (save the file with ',' between columns and '.' as decimal point)",
                    file=name, line=header_line,
                )
    header = [h.strip() for h in line.split(",")]
    if all(_is_number(h) for h in header):
        raise IntakeError(
            "no header line: the first row holds numbers; expected column names above the data, "
            "e.g. bias_V,conductance_S",
            file=name, line=header_line,
        )
    for h in header:
        if not h:
            raise IntakeError("empty column name in the header", file=name, line=header_line)
        problem = _column_problem(h)
        if problem:
            raise IntakeError(problem, file=name, line=header_line, field=h)
    return header


def parse_csv(name: str, raw: bytes) -> DataFile:
    """Parse one data file, refusing anything malformed with file, line and field named.

    The file is: metadata lines (``# key: value``, comments and blank lines), a header row of
    column names with their units, then rows of numbers (comment and blank lines skipped)."""
    lines = _text_lines(name, raw)
    metadata, metadata_lines, free, i = _parse_metadata(name, lines)
    if i >= len(lines):
        raise IntakeError("no header row found (expected e.g. 'bias_V,conductance_S')", file=name)
    header_line = i + 1
    header = _parse_header(name, lines[i], header_line)
    if len(set(header)) != len(header):
        dup = next(h for h in header if header.count(h) > 1)
        raise IntakeError("column appears twice in the header", file=name, line=header_line, field=dup)
    values, first = _parse_rows(name, lines, i + 1, header)
    if not values:
        raise IntakeError("the file has a header but no data rows", file=name, line=header_line)
    arr = np.array(values, dtype=float)
    return DataFile(
        name=name,
        raw=raw,
        sha256=sha256_hex(raw),
        metadata=metadata,
        metadata_lines=metadata_lines,
        columns={h: arr[:, k].copy() for k, h in enumerate(header)},
        header_line=header_line,
        first_data_line=first + 1,
        free_text=free,
    )


def _text_lines(name: str, raw: bytes) -> list[str]:
    """The file's lines, once it is known to be non-empty, not too large, UTF-8 text."""
    if len(raw) == 0:
        raise IntakeError("the file is empty", file=name)
    if len(raw) > MAX_FILE_BYTES:
        raise IntakeError(f"the file is larger than {MAX_FILE_BYTES // 2**20} MiB", file=name)
    if b"\x00" in raw[:8192]:
        raise IntakeError("this is a binary file; expected comma-separated text", file=name)
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise IntakeError(f"not UTF-8 text (byte {exc.start})", file=name) from None
    return text.splitlines()


def _parse_metadata(name: str, lines: list[str]) -> tuple[dict, dict, dict, int]:
    """The ``# key: value`` lines before the header: (metadata, the line of each key, free
    comments, index of the first line after them). Every key must be in the intake table."""
    metadata: dict = {}
    metadata_lines: dict = {}
    free: dict = {}
    i = 0
    while i < len(lines) and (lines[i].startswith("#") or not lines[i].strip()):
        line = lines[i].strip()
        i += 1
        if not line or line == "#":
            continue
        body = line[1:].strip()
        if ":" not in body:
            free.setdefault("comments", []).append(body)
            continue
        key, value = (s.strip() for s in body.split(":", 1))
        if not key:
            raise IntakeError(
                "a metadata line needs a key before ':' (e.g. '# junctions_in_series: 33')",
                file=name, line=i,
            )
        if key in metadata:
            raise IntakeError("this key is given twice", file=name, line=i, field=key)
        spec = _metadata_spec(name, i, key)
        try:
            metadata[key] = spec.parse(value)
        except ValueError as exc:
            raise IntakeError(str(exc), file=name, line=i, field=key) from None
        metadata_lines[key] = i
    return metadata, metadata_lines, free, i


def _metadata_spec(name: str, line: int, key: str):
    """The intake table's entry for a metadata key, or an error suggesting the closest key."""
    spec = METADATA_KEYS.get(key)
    if spec is not None:
        return spec
    close = difflib.get_close_matches(key, METADATA_KEYS.keys(), n=1, cutoff=0.8)
    if close:
        raise IntakeError(f"unknown key; did you mean {close[0]!r}?", file=name, line=line, field=key)
    # The table holds every kind's keys, so a key it lacks is a mistake, not free text.
    raise IntakeError(
        "unknown key; write remarks as '# note: …' or as a comment line without ':' "
        "(the keys are listed in docs/formats.md)",
        file=name, line=line, field=key,
    )


def _parse_rows(
    name: str, lines: list[str], start: int, header: list[str]
) -> tuple[list[list[float]], int]:
    """The data rows from line index ``start`` on: finite numbers, one per column; returns them
    and the index of the first data line (comment and blank lines between rows are skipped)."""
    values: list[list[float]] = []
    first = None
    for j in range(start, len(lines)):
        line = lines[j]
        if not line.strip() or line.lstrip().startswith("#"):
            continue
        if first is None:
            first = j
        cells = [c.strip() for c in line.split(",")]
        if len(cells) != len(header):
            raise IntakeError(
                f"expected {len(header)} values ({','.join(header)}), found {len(cells)}",
                file=name, line=j + 1,
            )
        row = []
        for col, cell in zip(header, cells, strict=True):
            try:
                v = float(cell)
            except ValueError:
                raise IntakeError(f"not a number: {cell!r}", file=name, line=j + 1, field=col) from None
            if not math.isfinite(v):
                raise IntakeError(f"value must be finite, got {cell!r}", file=name, line=j + 1, field=col)
            row.append(v)
        values.append(row)
    return values, (first if first is not None else start)


# --------------------------------------------------------------------------------------------
# Manifest


def parse_manifest(raw: bytes, name: str = "run.toml") -> dict:
    """Read run.toml; sections and keys are documented in docs/formats.md."""
    try:
        data = tomllib.loads(raw.decode("utf-8"))
    except UnicodeDecodeError:
        raise IntakeError("not UTF-8 text", file=name) from None
    except tomllib.TOMLDecodeError as exc:
        m = re.search(r"line (\d+)", str(exc))
        raise IntakeError(f"not valid TOML: {exc}", file=name, line=int(m.group(1)) if m else None) from None
    allowed = {"run", "laboratory", "customer", "item", "dates", "people", "method", "instruments",
               "device", "conditions", "sensor", "pump", "ammeter", "error_counting", "sweeps"}
    for section, body in data.items():
        if section not in allowed:
            close = difflib.get_close_matches(section, allowed, n=1, cutoff=0.7)
            hint = f"; did you mean [{close[0]}]?" if close else f"; known sections: {', '.join(sorted(allowed))}"
            raise IntakeError("unknown section" + hint, file=name, field=f"[{section}]")
        if not isinstance(body, dict):
            raise IntakeError("expected a [section] table", file=name, field=section)
    for path in ("run.kind", "run.seed", "run.coverage_probability"):
        manifest_field(data, path, name=name)
    return data


def manifest_field(manifest: dict, path: str, default: object = None, name: str = "run.toml") -> object:
    """A run.toml field, typed and checked by its entry in the intake table (``service.intake.table``),
    or ``default`` if absent."""
    try:
        return manifest_value(manifest, path, default)
    except FieldError as exc:
        raise IntakeError(str(exc), file=name, field=exc.field) from None


def manifest_number(manifest: dict, path: str, default: float | None = None) -> float | None:
    """A numeric run.toml field as a float (range from the intake table), or ``default``."""
    value = manifest_field(manifest, path)
    return default if value is None else float(value)


def check_manifest(manifest: dict, kind: str, name: str = "run.toml") -> None:
    """Every field of the intake table that the manifest gives, and the rules between them."""
    try:
        check_manifest_fields(manifest, kind)
    except FieldError as exc:
        raise IntakeError(str(exc), file=name, field=exc.field) from None


# --------------------------------------------------------------------------------------------
# Per-kind checks


def is_cbt_sweep(f: DataFile) -> bool:
    return "bias_V" in f.columns and ("conductance_S" in f.columns or "current_A" in f.columns)


def conductance_from_iv(bias: np.ndarray, current: np.ndarray) -> np.ndarray:
    """dI/dV of a DC I–V by second-order central differences on the (possibly uneven) grid.

    numpy.gradient's non-uniform formula (Fornberg, Math. Comp. 51, 699 (1988)), one-sided
    second-order at the ends. Differentiation amplifies noise by about 1/ΔV; this is why lock-in
    conductance is preferred when available.
    """
    order = np.argsort(bias)
    g = np.empty_like(bias)
    g[order] = np.gradient(current[order], bias[order], edge_order=2)
    return g


def check_cbt_sweep(f: DataFile) -> tuple[np.ndarray, np.ndarray]:
    """Validate a CBT sweep and return (bias, conductance); I–V files are differentiated."""
    if "junctions_in_series" not in f.metadata:
        raise IntakeError(
            "missing metadata line '# junctions_in_series: N' above the header", file=f.name,
            field="junctions_in_series",
        )
    bias = f.columns["bias_V"]
    if f.rows < MIN_SWEEP_POINTS:
        raise IntakeError(
            f"only {f.rows} data rows; a sweep needs at least {MIN_SWEEP_POINTS} points",
            file=f.name, line=f.header_line,
        )
    order = np.argsort(bias, kind="stable")
    sb = bias[order]
    rep = np.nonzero(np.diff(sb) == 0)[0]
    if rep.size:
        i = int(order[rep[0] + 1])
        raise IntakeError(f"bias value {bias[i]:g} V appears more than once", file=f.name,
                          line=f.line_of_row(i), field="bias_V")
    if "conductance_S" in f.columns:
        g = f.columns["conductance_S"]
        bad = np.nonzero(g <= 0)[0]
        if bad.size:
            i = int(bad[0])
            raise IntakeError(f"conductance must be positive, got {g[i]:g} S", file=f.name,
                              line=f.line_of_row(i), field="conductance_S")
    else:
        g = conductance_from_iv(bias, f.columns["current_A"])
        bad = np.nonzero(g <= 0)[0]
        if bad.size:
            i = int(bad[0])
            raise IntakeError("the I–V is not increasing here: dI/dV ≤ 0", file=f.name,
                              line=f.line_of_row(i), field="current_A")
    if "conductance_uncertainty_S" in f.columns and np.any(f.columns["conductance_uncertainty_S"] <= 0):
        i = int(np.nonzero(f.columns["conductance_uncertainty_S"] <= 0)[0][0])
        raise IntakeError("uncertainty must be positive", file=f.name, line=f.line_of_row(i),
                          field="conductance_uncertainty_S")
    return bias, g


def detect_kind(files: list[DataFile], manifest: dict) -> str:
    stated = manifest.get("run", {}).get("kind")
    if stated:
        return stated
    if any("pump_on" in f.columns or "gate_V" in f.columns for f in files):
        return KIND_PUMP
    sweeps = [f for f in files if "bias_V" in f.columns]
    if sweeps and all("sensor_resistance_ohm" in f.metadata for f in sweeps):
        return KIND_SENSOR
    if sweeps:
        return KIND_CBT
    found = "; ".join(f"{f.name}: {', '.join(f.columns)}" for f in files)
    raise IntakeError(
        "cannot tell what job these files are for: expected CBT sweeps (bias_V with conductance_S "
        f"or current_A) or pump records (time_s,current_A,pump_on or gate_V,current_A); found {found}",
        file=files[0].name if len(files) == 1 else None,
    )


def _metadata_line(f: DataFile, key: str) -> int | None:
    return f.metadata_lines.get(key)


def check_file_rules(files: list[DataFile], manifest: dict, kind: str) -> None:
    """What a kind needs of its files' metadata beyond each key's own type (intake table)."""
    for f in files:
        if kind == KIND_SENSOR:
            for key in ("sweep_started", "sweep_ended"):
                if key in f.metadata:
                    try:
                        iso_datetime(f.metadata[key])
                    except ValueError as exc:
                        raise IntakeError(str(exc), file=f.name, line=_metadata_line(f, key), field=key) from None
        if kind == KIND_PUMP and "current_A" in f.columns and "frequency_Hz" not in f.metadata \
                and manifest_field(manifest, "pump.frequency_Hz") is None:
            raise IntakeError(
                "missing pump frequency: add '# frequency_Hz: 1.0e9' (for example) above the header, or "
                "frequency_Hz under [pump] in run.toml",
                file=f.name, line=f.header_line, field="frequency_Hz",
            )


def load_files(named: dict[str, bytes]) -> Run:
    """Validate a run given as {file name: raw bytes} (a folder's or an upload's content)."""
    manifest_raw = named.get("run.toml")
    manifest = parse_manifest(manifest_raw) if manifest_raw is not None else {}
    files = []
    for name in sorted(named):
        if name == "run.toml":
            continue
        if not name.lower().endswith(".csv"):
            continue
        files.append(parse_csv(name, named[name]))
    if not files:
        raise IntakeError("the run holds no .csv data files")
    kind = detect_kind(files, manifest)
    check_manifest(manifest, kind)
    check_file_rules(files, manifest, kind)
    if kind == KIND_PUMP:
        from service.intake.pump_files import check_pump_files

        check_pump_files(files)
    if kind in (KIND_CBT, KIND_SENSOR):
        for f in files:
            if "bias_V" in f.columns and not is_cbt_sweep(f):
                raise IntakeError(
                    "a sweep needs a conductance_S column (lock-in) or a current_A column (DC I–V) "
                    f"beside bias_V; found {', '.join(f.columns)}",
                    file=f.name, line=f.header_line, field="conductance_S",
                )
            if kind == KIND_CBT and not is_cbt_sweep(f):
                raise IntakeError(
                    f"not a CBT sweep: expected columns bias_V,conductance_S; found {', '.join(f.columns)}",
                    file=f.name, line=f.header_line,
                )
        sweeps = [f for f in files if is_cbt_sweep(f)]
        if not sweeps:
            raise IntakeError("a thermometry run needs at least one sweep with columns bias_V and conductance_S (or current_A)")
        for f in sweeps:
            check_cbt_sweep(f)
    return Run(path="", manifest=manifest, files=tuple(files), kind=kind, manifest_raw=manifest_raw)


def load_run(folder: str | Path) -> Run:
    """Validate a run folder: every ``*.csv`` in it and ``run.toml`` if present."""
    folder = Path(folder)
    if not folder.is_dir():
        raise IntakeError(f"not a folder: {folder}")
    named = {}
    for p in sorted(folder.iterdir()):
        if p.is_file() and (p.suffix.lower() == ".csv" or p.name == "run.toml"):
            named[p.name] = p.read_bytes()
    run = load_files(named)
    return Run(path=str(folder), manifest=run.manifest, files=run.files, kind=run.kind,
               manifest_raw=run.manifest_raw)
