"""Item commands on an instance folder: ``history ITEM`` and ``due``."""

from __future__ import annotations

import argparse
import json
from datetime import date
from pathlib import Path

from service.cli.main import CommandError
from service.cli.service_commands import _add_instance, _app
from service.render.numbers import g_or_dash as _g


def add_commands(subparsers: argparse._SubParsersAction) -> None:
    p = subparsers.add_parser(
        "history",
        help="an item's certificates in time order, drift of its quantities and its due date",
    )
    _add_instance(p)
    p.add_argument("item", help="item identifier as on its certificates")
    p.add_argument("--json", action="store_true", help="print the history as JSON")
    p.add_argument("--pdf", metavar="FILE", help="also write the history report as PDF")
    p.set_defaults(handler=_history)
    p = subparsers.add_parser("due", help="items with a certificate in force and their due dates")
    _add_instance(p)
    p.add_argument("--status", choices=("overdue", "due", "in date"), help="only these")
    p.add_argument("--json", action="store_true", help="print the list as JSON")
    p.set_defaults(handler=_due)


def _services(args: argparse.Namespace):
    app = _app(args)
    return app, app.extensions["coldcert"]


def _history(args: argparse.Namespace) -> int:
    from service.archive import ArchiveError
    from service.archive.history import HistoryInputError, public_history
    from service.archive.items import item_history

    app, services = _services(args)
    try:
        history = item_history(
            services.archive, args.item, app.config.get("RECALL_POLICY"), date.today()
        )
    except (ArchiveError, HistoryInputError) as exc:
        raise CommandError(str(exc)) from None
    if args.pdf:
        from service.render.history_pdf import render_history_pdf
        from service.render.history_plots import history_plots

        Path(args.pdf).write_bytes(render_history_pdf(history, history_plots(history)))
    if args.json:
        print(json.dumps(public_history(history), indent=2, ensure_ascii=False))
        return 0
    print(f"History of {history['item']} ({', '.join(history['kinds'])})")
    for c in history["certificates"]:
        print(
            f"  {c['calibration_date'] or '—':<10}  {c['certificate_id']:<20} "
            f"{c['state']:<10} {c['remark']}"
        )
    for q in history["quantities"]:
        print(f"{q['name']} [{q['unit']}]: model {q['chosen_model']} ({q['criterion']})")
        for p in q["points"]:
            print(f"  {p['date']}  {_g(p['value'], 8):>14}  U {_g(p['expanded_uncertainty'], 2)}")
        if q.get("prediction"):
            pr = q["prediction"]
            print(
                f"  predicted {pr['date']}: {_g(pr['value'], 8)} ± "
                f"{_g(pr['expanded_uncertainty'], 2)} (U)"
            )
        for reason in q["changed_reasons"]:
            print(f"  changed: {reason}")
    for d in history["curve_differences"]:
        if d.get("error"):
            print(f"ΔT(R) {d['second']} − {d['first']}: {d['error']}")
        else:
            print(
                f"ΔT(R) {d['second']} − {d['first']}: largest |ΔT|/U = "
                f"{d['max_normalised_difference']:.2f}"
            )
    for note in history["notes"]:
        print(f"note: {note}")
    r = history["recall"]
    print(
        f"recall: {r['status']}; due {r.get('due_date') or '—'} "
        f"(interval {r.get('interval_days')} d, {r.get('method') or '—'}; "
        f"limited by {r.get('limited_by') or '—'})"
    )
    return 0


def _due(args: argparse.Namespace) -> int:
    from service.archive.history import HistoryInputError
    from service.archive.items import recall_overview

    app, services = _services(args)
    try:
        rows = recall_overview(services.archive, app.config.get("RECALL_POLICY"), date.today())
    except HistoryInputError as exc:
        raise CommandError(str(exc)) from None
    if args.status:
        rows = [r for r in rows if r["status"] == args.status]
    if args.json:
        print(json.dumps(rows, indent=2, ensure_ascii=False))
        return 0
    for r in rows:
        print(f"{r.get('due_date') or '—':<10}  {r['status']:<8}  {r['item']}")
    return 0
