"""Service and audit commands: ``serve``, ``add-admin``, ``new-token``, ``verify``, ``reproduce``.

Each works on an instance folder (``--instance``, or the ``COLDCERT_INSTANCE`` environment
variable, or ``./instance``), the same folder the web service uses.
"""

from __future__ import annotations

import argparse
import getpass
import json
import os
import signal
import sys
import threading
from pathlib import Path

from service.cli.main import CommandError

DEFAULT_INSTANCE = "instance"


def _instance(args: argparse.Namespace) -> str:
    return args.instance or os.environ.get("COLDCERT_INSTANCE") or DEFAULT_INSTANCE


def _add_instance(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--instance",
        default=None,
        help="instance folder (database, raw files, lab key); default $COLDCERT_INSTANCE "
        f"or ./{DEFAULT_INSTANCE}",
    )


def _add_read_only(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--read-only",
        action="store_true",
        help="open the instance for reading only (an audit copy or a backup): nothing is "
        "written, not even the event log; chosen anyway when the folder cannot be written",
    )


def _app(args: argparse.Namespace, **config):
    from service.web.app import create_app

    return create_app({"INSTANCE_PATH": _instance(args), **config})


def _existing_app(args: argparse.Namespace, **config):
    """The app of an instance that must already exist (read-only commands never create one).

    An instance is a folder holding the lab key and either the embedded database or a
    ``config.py`` that names a database server.
    """
    folder = Path(_instance(args)).resolve()
    has_database = (folder / "coldcert.sqlite3").is_file() or (folder / "config.py").is_file()
    if not folder.is_dir() or not has_database:
        how = (
            "--instance" if args.instance
            else "$COLDCERT_INSTANCE" if os.environ.get("COLDCERT_INSTANCE")
            else "the default ./instance"
        )
        raise CommandError(
            f"no coldcert instance at {folder} (from {how}); nothing was created. Choose the "
            "archive's folder with --instance FOLDER or the COLDCERT_INSTANCE environment variable"
        )
    if getattr(args, "read_only", False):
        config.setdefault("READ_ONLY", True)
    return _app(args, **config)


def add_commands(subparsers: argparse._SubParsersAction) -> None:
    for add in (_add_serve, _add_work, _add_add_admin, _add_new_token, _add_verify, _add_reproduce):
        add(subparsers)


def _add_serve(subparsers: argparse._SubParsersAction) -> None:
    """`coldcert serve`: the web pages and JSON API on this machine."""
    p = subparsers.add_parser(
        "serve", help="run the calibration service (web pages + JSON API) on this machine"
    )
    _add_instance(p)
    p.add_argument("--host", default="127.0.0.1", help="address to listen on (default 127.0.0.1)")
    p.add_argument("--port", type=int, default=8600, help="port (default 8600)")
    p.add_argument(
        "--workers",
        type=int,
        default=2,
        help="background analysis processes of the embedded pool (0: none, e.g. when "
        "`coldcert work` runs them, or a second web process behind a proxy); with a broker "
        "configured the workers are `coldcert work` processes and this is ignored",
    )
    p.add_argument(
        "--threads", type=int, default=8, help="request threads of the web server (default 8)"
    )
    p.add_argument(
        "--proxy",
        default=None,
        metavar="ADDRESS",
        help="address of a reverse proxy in front of this server whose X-Forwarded-For/-Proto/"
        "-Host headers are to be trusted (e.g. 127.0.0.1); default: the TRUSTED_PROXY setting",
    )
    p.add_argument(
        "--development-server",
        action="store_true",
        help="use werkzeug's development server instead of waitress (never for users)",
    )
    _add_read_only(p)
    p.add_argument(
        "--quick",
        action="store_true",
        help="short MCMC settings (for trying the service out; recorded on each certificate)",
    )
    p.set_defaults(handler=_serve)


def _add_work(subparsers: argparse._SubParsersAction) -> None:
    """`coldcert work`: analysis workers without a web server."""
    p = subparsers.add_parser(
        "work",
        help="run analysis workers only (no web server), e.g. on another machine: with a broker "
        "configured, distributed-queue workers; otherwise the embedded pool's processes",
    )
    _add_instance(p)
    p.add_argument("--processes", type=int, default=1, help="worker processes (default 1)")
    p.add_argument("--quick", action="store_true", help="short MCMC settings")
    p.add_argument(
        "--broker",
        default=None,
        metavar="URL",
        help="broker URL (e.g. redis://host:6379/0); default BROKER_URL of the instance's "
        "config.py or $COLDCERT_BROKER_URL",
    )
    p.add_argument(
        "--database",
        default=None,
        metavar="URL",
        help="database URL; default DATABASE_URL of config.py, $COLDCERT_DATABASE_URL, or the "
        "instance's SQLite file",
    )
    p.set_defaults(handler=_work)


def _add_add_admin(subparsers: argparse._SubParsersAction) -> None:
    """`coldcert add-admin`: the first (or another) administrator."""
    p = subparsers.add_parser("add-admin", help="create an administrator account")
    _add_instance(p)
    p.add_argument("username")
    p.add_argument("--display-name", default="")
    p.add_argument(
        "--password-stdin",
        action="store_true",
        help="read the password from standard input instead of prompting",
    )
    p.set_defaults(handler=_add_admin)


def _add_new_token(subparsers: argparse._SubParsersAction) -> None:
    """`coldcert new-token`: an API token for a user."""
    p = subparsers.add_parser("new-token", help="create an API token for a user (shown once)")
    _add_instance(p)
    p.add_argument("username")
    p.add_argument("--label", default="")
    p.set_defaults(handler=_new_token)


def _add_verify(subparsers: argparse._SubParsersAction) -> None:
    """`coldcert verify`: one certificate, an exported file, or the whole archive."""
    p = subparsers.add_parser(
        "verify",
        help="check a certificate's signature, hash chain and raw files "
        "(a certificate id in the archive, or an exported signed JSON file)",
    )
    _add_instance(p)
    p.add_argument("target", metavar="FILE_OR_ID", nargs="?", help="signed JSON file or id")
    p.add_argument("--all", action="store_true", help="verify the whole archive chain")
    p.add_argument(
        "--public-key",
        default=None,
        help="the lab's published public key (PEM or hex file) for checking a file offline",
    )
    p.add_argument("--json", action="store_true", help="print the report as JSON")
    _add_read_only(p)
    p.set_defaults(handler=_verify)


def _add_reproduce(subparsers: argparse._SubParsersAction) -> None:
    """`coldcert reproduce`: re-run an archived analysis and compare."""
    p = subparsers.add_parser(
        "reproduce",
        help="re-run an archived certificate's analysis from its archived raw data and compare "
        "every number bit for bit",
    )
    _add_instance(p)
    p.add_argument("certificate_id")
    p.add_argument("--json", action="store_true", help="print the report as JSON")
    p.set_defaults(handler=_reproduce)


def _serve(args: argparse.Namespace) -> int:
    options = {"fast": True} if args.quick else {}
    proxy = {"TRUSTED_PROXY": args.proxy} if args.proxy else {}
    try:
        app = _app(
            args,
            START_WORKERS=True,
            WORKERS=args.workers,
            ANALYSIS_OPTIONS=options,
            READ_ONLY=args.read_only,
            **proxy,
        )
    except ValueError as exc:
        raise CommandError(str(exc)) from None
    services = app.extensions["coldcert"]
    print(f"coldcert: instance {app.instance_path}", file=sys.stderr)
    print(f"coldcert: lab public key {services.key.key_id}", file=sys.stderr)
    if services.engine is not None:
        print("coldcert: analysis jobs go to the distributed queue", file=sys.stderr)
    server_name = "werkzeug development server" if args.development_server else "waitress"
    print(
        f"coldcert: serving on http://{args.host}:{args.port}/ ({server_name})",
        file=sys.stderr,
        flush=True,
    )

    def _terminate(_signum, _frame):
        # SIGTERM (service managers, kill) stops like Ctrl-C: workers are told to finish first.
        raise KeyboardInterrupt

    signal.signal(signal.SIGTERM, _terminate)
    try:
        if args.development_server:
            app.run(host=args.host, port=args.port, threaded=True, use_reloader=False)
        else:
            from service.web.server import production_server

            proxy_address = app.config.get("TRUSTED_PROXY")
            production_server(app, args.host, args.port, args.threads, proxy_address).run()
    finally:
        services.stop_workers()
    return 0


def _work(args: argparse.Namespace) -> int:
    from service.web.app import load_config, worker_settings

    overrides = {"ANALYSIS_OPTIONS": {"fast": True}} if args.quick else {}
    if args.broker:
        overrides["BROKER_URL"] = args.broker
    if args.database:
        overrides["DATABASE_URL"] = args.database
    instance = Path(_instance(args)).resolve()
    config = load_config(instance, overrides)
    settings = worker_settings(config, instance)
    if config["BROKER_URL"]:
        return _work_distributed(config, settings, args.processes)
    from service.queue.jobs import WorkerPool

    storage = settings.open_storage()
    try:
        storage.create_schema()
    finally:
        storage.dispose()
    stop = threading.Event()

    def _terminate(_signum, _frame):
        stop.set()

    signal.signal(signal.SIGTERM, _terminate)
    signal.signal(signal.SIGINT, _terminate)
    pool = WorkerPool(settings, args.processes)
    pool.start()
    print(
        f"coldcert: {args.processes} worker process(es) {pool.pids} on {instance}",
        file=sys.stderr,
        flush=True,
    )
    try:
        while not stop.wait(1.0):
            pass
    finally:
        pool.stop()
    return 0


def _work_distributed(config, settings, processes: int) -> int:
    """Celery workers taking analysis jobs from the broker (no web server, no signing key)."""
    from service.queue.engine import EngineQueue, redact, worker_argv
    from service.queue.jobs import import_string
    from service.web.app import engine_settings

    # Import the analysis once here: the worker processes forked from this one start ready.
    import_string(settings.certify)
    import_string(settings.load_run)

    storage = settings.open_storage()
    storage.create_schema()
    # Worker processes are forked from this one; they open their own connections and must not
    # touch (or close) the ones inherited from here.
    if hasattr(os, "register_at_fork"):  # POSIX; Windows workers do not fork
        os.register_at_fork(after_in_child=lambda: storage.engine.dispose(close=False))
    engine = engine_settings(config)
    queue = EngineQueue(storage, settings, engine)
    # This machine also re-publishes jobs whose message was lost and re-queues jobs whose
    # worker died, so nothing waits for a web process to notice.
    queue.start()
    print(
        f"coldcert: {processes} distributed worker process(es) on {redact(engine.broker_url)}, "
        f"database {redact(settings.database_url)}",
        file=sys.stderr,
        flush=True,
    )
    try:
        queue.celery.worker_main(worker_argv(processes))
    except SystemExit as exc:
        return int(exc.code or 0)
    finally:
        queue.stop()
        storage.dispose()
    return 0


def _read_password(args: argparse.Namespace) -> str:
    if args.password_stdin:
        return sys.stdin.readline().rstrip("\n")
    first = getpass.getpass("Password for the new administrator: ")
    second = getpass.getpass("Repeat the password: ")
    if first != second:
        raise CommandError("the two passwords differ; nothing was created")
    return first


def _add_admin(args: argparse.Namespace) -> int:
    from service.web.auth import AuthError, create_user

    app = _app(args)
    password = _read_password(args)
    try:
        user = create_user(
            app.extensions["coldcert"].storage,
            args.username,
            ["admin"],
            password=password,
            display_name=args.display_name,
            actor="command line",
        )
    except AuthError as exc:
        raise CommandError(str(exc)) from None
    print(f"created administrator {user['username']} in {app.instance_path}")
    return 0


def _new_token(args: argparse.Namespace) -> int:
    from service.web.auth import AuthError, create_token

    app = _app(args)
    try:
        token = create_token(
            app.extensions["coldcert"].storage, args.username, args.label, actor="command line"
        )
    except AuthError as exc:
        raise CommandError(str(exc)) from None
    print(token)
    return 0


def _load_public_key(path: str) -> bytes:
    from cryptography.hazmat.primitives import serialization

    text = Path(path).read_bytes()
    if b"BEGIN PUBLIC KEY" in text:
        key = serialization.load_pem_public_key(text)
        return key.public_bytes(serialization.Encoding.Raw, serialization.PublicFormat.Raw)
    try:
        raw = bytes.fromhex(text.decode("ascii").strip())
    except ValueError:
        raise CommandError(f"{path}: expected a PEM public key or 64 hex digits") from None
    if len(raw) != 32:
        raise CommandError(f"{path}: an Ed25519 public key has 32 bytes, found {len(raw)}")
    return raw


def _print_checks(checks, as_json: bool, header: dict) -> None:
    if as_json:
        print(json.dumps({**header, "checks": [c.__dict__ for c in checks]}, indent=2))
        return
    for check in checks:
        print(f"  [{'ok' if check.ok else 'FAIL'}] {check.what}: {check.detail}")


def _verify(args: argparse.Namespace) -> int:
    from service.archive import ArchiveError, verify_signed_document

    if args.all:
        app = _existing_app(args)
        ok, problems = app.extensions["coldcert"].archive.verify_all()
        _print_checks(problems, args.json, {"valid": ok})
        print("archive valid" if ok else f"archive NOT valid: {len(problems)} problem(s)")
        return 0 if ok else 1
    if not args.target:
        raise CommandError("give a certificate id or a signed JSON file, or --all")
    if Path(args.target).is_file():
        try:
            document = json.loads(Path(args.target).read_text(encoding="utf-8"))
        except (ValueError, UnicodeDecodeError) as exc:
            raise CommandError(f"{args.target}: not a JSON file ({exc})") from None
        public = None
        if args.public_key:
            public = _load_public_key(args.public_key)
        elif args.instance or os.environ.get("COLDCERT_INSTANCE"):
            public = _existing_app(args).extensions["coldcert"].key.public_raw
        checks = verify_signed_document(document, public)
        ok = all(c.ok for c in checks)
        _print_checks(checks, args.json, {"file": args.target, "valid": ok})
        if public is None:
            print(
                "note: checked against the key inside the file; give --public-key (the lab's "
                "published key) to also prove who signed it",
                file=sys.stderr,
            )
        print(f"{args.target}: {'valid' if ok else 'NOT valid'}")
        return 0 if ok else 1
    app = _existing_app(args)
    try:
        report = app.extensions["coldcert"].archive.verify(args.target)
    except ArchiveError as exc:
        raise CommandError(str(exc)) from None
    _print_checks(report.checks, args.json, {"certificate_id": args.target, "valid": report.valid})
    print(f"{args.target} ({report.state}): {'valid' if report.valid else 'NOT valid'}")
    return 0 if report.valid else 1


def _reproduce(args: argparse.Namespace) -> int:
    from service.archive import ArchiveError
    from service.queue.jobs import import_string

    app = _existing_app(args)
    services = app.extensions["coldcert"]
    certify = import_string(app.config["CERTIFY"])
    load_run = import_string(app.config["LOAD_RUN"])

    def progress(fraction: float, step: str) -> None:
        print(f"\r  {100 * fraction:5.1f} %  {step[:60]:<60}", end="", file=sys.stderr)

    try:
        report = services.archive.reproduce(args.certificate_id, certify, load_run, progress)
    except ArchiveError as exc:
        raise CommandError(str(exc)) from None
    print(file=sys.stderr)
    if args.json:
        print(json.dumps(report.as_dict(), indent=2, default=str))
    else:
        for m in report.mismatches[:50]:
            print(f"  differs: {m.path}: archived {m.archived!r}, reproduced {m.reproduced!r}")
        if not report.same_software:
            print(
                f"  note: software now {report.software_now}, at issue {report.software_recorded}"
            )
    verdict = (
        f"all {report.numbers_compared} numbers identical bit for bit"
        if report.identical
        else f"{len(report.mismatches)} of {report.numbers_compared} numbers differ"
    )
    print(f"{args.certificate_id} (seed {report.seed}): {verdict}")
    return 0 if report.identical else 1
