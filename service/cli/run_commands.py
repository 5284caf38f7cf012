"""Core CLI commands: ``coldcert certify RUN --out DIR`` and ``coldcert check RUN``."""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
from pathlib import Path

from service.cli.main import CommandError

# Handlers import what they use (service.intake loads numpy): `coldcert --help` and the commands
# that do not read a run start in a fraction of a second.


def add_commands(sub) -> None:
    p = sub.add_parser("certify", help="analyse a run folder and write a draft certificate")
    p.add_argument("run", help="run folder: CSV data files and an optional run.toml")
    p.add_argument("--out", required=True, help="folder for certificate.json, certificate.html, ...")
    p.add_argument("--seed", type=int, default=None,
                   help="random seed for the MCMC (default: run.toml [run] seed, else 20261201)")
    p.add_argument("--quick", action="store_true",
                   help="quick-look convergence rule (20 autocorrelation times); marked on the certificate")
    p.add_argument("--workers", type=positive_int, default=None, metavar="N",
                   help="processes that fit sweeps side by side (default: $COLDCERT_WORKERS, else one "
                        "per CPU); the certificate is the same for any N")
    p.set_defaults(handler=cmd_certify)

    z = sub.add_parser("secondary", help="zero-bias conductance log -> temperatures, using a CBT certificate")
    z.add_argument("certificate", help="certificate.json of a primary (preferably global) CBT fit")
    z.add_argument("log", help="CSV with columns time_s,conductance_S (optional conductance_uncertainty_S)")
    z.add_argument("--out", required=True, help="CSV to write: time_s,temperature_K,standard_uncertainty_K")
    z.add_argument("--max-age-days", type=float, default=90.0,
                   help="warn when the certificate's measurement date is older than this (charging energy drifts)")
    z.set_defaults(handler=cmd_secondary)

    pl = sub.add_parser("plan", help="recommend a CBT sweep for a device and temperature, and predict its uncertainty")
    pl.add_argument("--junctions", type=int, required=True, help="N, junctions in series")
    pl.add_argument("--rows", type=int, default=1, help="M, rows in parallel")
    pl.add_argument("--junction-resistance", type=float, required=True, help="R_T of one junction, ohm")
    pl.add_argument("--capacitance", type=float, required=True, help="C of one junction, F")
    pl.add_argument("--ground-capacitance", type=float, default=0.0, help="C_0 of one island to ground, F")
    pl.add_argument("--island-volume", type=float, default=None, help="island volume, m^3 (for self-heating)")
    pl.add_argument("--temperature", type=float, required=True, help="target temperature, K")
    pl.add_argument("--noise", type=float, default=2e-4, help="relative noise per point (of G_T)")
    pl.add_argument("--width-error", type=float, default=1e-3, help="largest unmodelled excitation width error")
    pl.add_argument("--points", type=int, default=401)
    pl.add_argument("--json", action="store_true", help="print the plan as JSON")
    pl.set_defaults(handler=cmd_plan)

    c = sub.add_parser("check", help="validate a run folder without analysing it")
    c.add_argument("run")
    c.set_defaults(handler=cmd_check)


class ProgressBar:
    """A one-line progress bar on stderr, only when stderr is a terminal."""

    def __init__(self, stream=None):
        self.stream = stream if stream is not None else sys.stderr
        self.tty = self.stream.isatty()
        self.last = -1

    def __call__(self, fraction: float, step: str) -> None:
        # Parallel sweeps report out of order; the bar never moves backwards.
        fraction = max(float(fraction), self.last)
        self.last = fraction
        if not self.tty:
            return
        width = 30
        filled = int(round(width * fraction))
        line = f"\r[{'#' * filled}{'.' * (width - filled)}] {fraction * 100:5.1f}%  {step[:60]:<60}"
        self.stream.write(line)
        self.stream.flush()

    def done(self) -> None:
        if self.tty:
            self.stream.write("\n")


def write_atomically(folder: Path, files: dict[str, bytes]) -> None:
    """Write each file through a temp file + fsync + rename, in order (last = completion marker)."""
    folder.mkdir(parents=True, exist_ok=True)
    for name, data in files.items():
        fd, tmp = tempfile.mkstemp(prefix=f".{name}.", dir=folder)
        try:
            os.fchmod(fd, 0o644)
            with os.fdopen(fd, "wb") as fh:
                fh.write(data)
                fh.flush()
                os.fsync(fh.fileno())
            os.replace(tmp, folder / name)
        except BaseException:
            Path(tmp).unlink(missing_ok=True)
            raise


def positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        value = 0
    if value < 1:
        raise argparse.ArgumentTypeError(f"expected a whole number of 1 or more, got {text!r}")
    return value


def cmd_certify(args) -> int:
    from service.calibrations.certify import certify_run
    from service.calibrations.outcome import CertificationRefused
    from service.calibrations.parallel import WORKERS_VARIABLE, WorkersError, worker_count
    from service.intake import IntakeError, load_run

    if args.workers is not None:
        os.environ[WORKERS_VARIABLE] = str(args.workers)
    try:
        worker_count()
    except WorkersError as exc:
        raise CommandError(str(exc)) from None
    bar = ProgressBar()
    try:
        run = load_run(args.run)
        cert = certify_run(run, seed=args.seed, progress=bar, fast=args.quick)
    except IntakeError as exc:
        bar.done()
        raise CommandError(exc.describe()) from None
    except CertificationRefused as exc:
        bar.done()
        raise CommandError(f"certificate refused: {exc}") from None
    except NotImplementedError as exc:
        bar.done()
        raise CommandError(str(exc)) from None
    bar.done()
    out = Path(args.out)
    (out / "certificate.json").unlink(missing_ok=True)  # a stale record must not look complete
    write_atomically(out, cert.files())
    rec = cert.record
    print(f"{rec['certificate_id']}: {len(rec['results'])} result(s) written to {out}/certificate.json")
    for r in rec["results"]:
        rep = r.get("reported", {})
        print(f"  {r.get('sweep', '')}: {r['name']} = {rep.get('value', r['value'])} {r['unit']}, "
              f"U = {rep.get('expanded_uncertainty', r['expanded_uncertainty'])} {r['unit']} "
              f"(k = {r['coverage_factor']:.2f}, p = {r['coverage_probability']})")
    return 0


def cmd_check(args) -> int:
    from service.intake import IntakeError, load_run

    try:
        run = load_run(args.run)
    except IntakeError as exc:
        raise CommandError(exc.describe()) from None
    print(f"{args.run}: {run.kind}, {len(run.files)} data file(s) accepted")
    return 0


def secondary_calibration_from_record(record: dict):
    """ΔE and G_T (with uncertainties) from a thermometry certificate record."""
    from analysis.cbt.secondary import SecondaryCalibration

    if record.get("job") not in ("cbt_thermometry", "sensor_calibration"):
        raise CommandError("the certificate is not from a CBT thermometry run")
    fits = [r["fit"] for r in record.get("results", []) if "fit" in r]
    if not fits:
        raise CommandError("the certificate holds no CBT fit results")
    gf = record.get("sections", {}).get("global_fit")
    if gf:
        E, uE = gf["charging_energy_K"], gf["charging_energy_std_K"]
    else:
        best = min(fits, key=lambda f: f["charging_energy_std_K"] / f["charging_energy_K"])
        E, uE = best["charging_energy_K"], best["charging_energy_std_K"]
    gts = [f["asymptotic_conductance_S"] for f in fits]
    gt = sum(gts) / len(gts)
    spread = (sum((g - gt) ** 2 for g in gts) / (len(gts) - 1)) ** 0.5 if len(gts) > 1 else 0.0
    u_gt = max(spread, max(f["asymptotic_conductance_std_S"] for f in fits))
    return SecondaryCalibration(E, uE, gt, u_gt)


def cmd_secondary(args) -> int:
    import datetime as dt
    import json

    import numpy as np

    from analysis.cbt.secondary import temperatures_from_zero_bias
    from service.intake import IntakeError, parse_csv

    try:
        record = json.loads(Path(args.certificate).read_text(encoding="utf-8"))
    except (OSError, json.JSONDecodeError) as exc:
        raise CommandError(f"{args.certificate}: cannot read the certificate ({exc})") from None
    cal = secondary_calibration_from_record(record)
    path = Path(args.log)
    try:
        f = parse_csv(path.name, path.read_bytes())
    except OSError as exc:
        raise CommandError(f"{path}: {exc}") from None
    except IntakeError as exc:
        raise CommandError(exc.describe()) from None
    for col in ("time_s", "conductance_S"):
        if col not in f.columns:
            raise CommandError(f"{path.name}:{f.header_line}: {col}: missing column (expected time_s,conductance_S)")
    g_u = f.columns.get("conductance_uncertainty_S", 0.0)
    try:
        res = temperatures_from_zero_bias(f.columns["conductance_S"], cal, g_u)
    except ValueError as exc:
        msg = str(exc)
        if msg.startswith("reading "):
            i = int(msg.split()[1].rstrip(":")) - 1
            raise CommandError(f"{path.name}:{f.line_of_row(i)}: conductance_S: {msg.split(':', 1)[1].strip()}") from None
        raise CommandError(f"{path.name}: {msg}") from None
    measured = record.get("dates", {}).get("measured")
    if measured:
        try:
            age = (dt.date.today() - dt.date.fromisoformat(str(measured)[:10])).days
        except ValueError:
            age = None
        if age is not None and age > args.max_age_days:
            print(f"coldcert: warning: the charging energy was measured {age} days ago; it can drift "
                  "(refit it with a primary sweep)", file=sys.stderr)
    from analysis.budget import round_for_report

    # temperature_K and its uncertainty are rounded as a certificate prints them (GUM 7.2.6, two
    # significant digits of u); the *_unrounded_K columns keep full precision for further work.
    lines = ["time_s,conductance_S,temperature_K,standard_uncertainty_K,"
             "temperature_unrounded_K,standard_uncertainty_unrounded_K"]
    for t, g, T, u in zip(f.columns["time_s"], f.columns["conductance_S"], res.temperature,
                          res.standard_uncertainty, strict=True):
        T_r, u_r = round_for_report(float(T), float(u))
        lines.append(f"{float(t)!r},{float(g)!r},{T_r},{u_r},{float(T)!r},{float(u)!r}")
    write_atomically(Path(args.out).parent, {Path(args.out).name: ("\n".join(lines) + "\n").encode()})
    print(f"{len(lines) - 1} readings -> {args.out} (T from {np.min(res.temperature):.5g} to "
          f"{np.max(res.temperature):.5g} K; ΔE/k_B = {cal.charging_energy * 1e3:.4g} mK)")
    return 0


def cmd_plan(args) -> int:
    import json

    from analysis.cbt.planning import Device, plan_sweep

    if args.junctions < 2 or args.rows < 1:
        raise CommandError("--junctions must be at least 2 and --rows at least 1")
    for name in ("junction_resistance", "capacitance", "temperature", "noise", "width_error"):
        if not getattr(args, name) > 0:
            raise CommandError(f"--{name.replace('_', '-')} must be positive")
    device = Device(args.junctions, args.rows, args.junction_resistance, args.capacitance,
                    args.ground_capacitance, args.island_volume)
    plan = plan_sweep(device, args.temperature, args.noise, args.width_error, points=args.points)
    if args.json:
        print(json.dumps(plan.as_dict(), indent=2))
        return 0
    print(f"device: dE/k_B = {device.charging_energy_K * 1e3:.4g} mK, G_T = {device.asymptotic_conductance_S:.4g} S")
    print(f"at T = {plan.temperature_K * 1e3:.4g} mK: u = {plan.u:.3g}, depth {plan.depth:.4f}, "
          f"V_1/2 = {plan.half_width_voltage_V * 1e6:.4g} uV")
    print(f"sweep: -{plan.bias_range_V * 1e6:.4g} uV to +{plan.bias_range_V * 1e6:.4g} uV, {plan.points} points")
    print(f"largest lock-in excitation: {plan.max_excitation_rms_V * 1e6:.3g} uV rms "
          f"(width error {plan.excitation_width_error:g} if unmodelled)")
    if plan.heating_at_half_width is not None:
        print(f"self-heating at the half-depth bias: {100 * plan.heating_at_half_width:.2g} %")
    print(f"best achievable u(T)/T at relative noise {args.noise:g}: {plan.predicted_relative_uncertainty:.2e}")
    for n in plan.notes:
        print(f"note: {n}")
    return 0
