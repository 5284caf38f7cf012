"""Core CLI commands: ``coldcert certify RUN --out DIR`` and ``coldcert check RUN``."""

from __future__ import annotations

import os
import sys
import tempfile
from pathlib import Path

from service.cli import CommandError
from service.intake import IntakeError, load_run


def add_commands(sub) -> None:
    p = sub.add_parser("certify", help="analyse a run folder and write a draft certificate")
    p.add_argument("run", help="run folder: CSV data files and an optional run.toml")
    p.add_argument("--out", required=True, help="folder for certificate.json, certificate.html, ...")
    p.add_argument("--seed", type=int, default=None,
                   help="random seed for the MCMC (default: run.toml [run] seed, else 20261201)")
    p.add_argument("--quick", action="store_true",
                   help="quick-look convergence rule (20 autocorrelation times); marked on the certificate")
    p.set_defaults(handler=cmd_certify)

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


def cmd_certify(args) -> int:
    from service.certify import certify_run
    from service.thermometry import CertificationRefused

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
    try:
        run = load_run(args.run)
    except IntakeError as exc:
        raise CommandError(exc.describe()) from None
    print(f"{args.run}: {run.kind}, {len(run.files)} data file(s) accepted")
    return 0
