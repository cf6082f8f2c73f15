"""`advisory notices list|show|resend`: the office view of notices sent."""

from __future__ import annotations

import datetime as dt

from sqlalchemy import select
from sqlalchemy.orm import aliased

from advisory import settings as settings_mod
from advisory.errors import InputError, NotFoundError
from advisory.notices import deliver, retry_queue
from advisory.notices.render import FORMATS, as_notice, render
from advisory.store.db import Database
from advisory.store.schema import Block, Delivery, Farm, Notice, Recipient


def register(sub) -> None:
    p = sub.add_parser("notices", help="notices: list, show, resend, retry what failed")
    nsub = p.add_subparsers(dest="notices_command", metavar="ACTION")
    nsub.required = True
    ls = nsub.add_parser("list", help="list notices with their delivery status")
    ls.add_argument("--farm", help="only this farm")
    ls.add_argument("--night", metavar="D", help="only this night or day (YYYY-MM-DD)")
    ls.add_argument("--block", metavar="B", help="only this block")
    ls.add_argument("--limit", type=int, default=200, help="at most this many (newest first; default 200)")
    ls.add_argument("--undelivered", action="store_true",
                    help="only notices that did not reach a recipient on any channel, each with why")
    ls.set_defaults(func=do_list)
    sh = nsub.add_parser("show", help="print one notice")
    sh.add_argument("id", metavar="ID|KEY", help="the notice's id or key (as `notices list` shows them)")
    sh.add_argument("--format", choices=FORMATS, default="text",
                    help="text (default), markdown, html (chart embedded), json or sms")
    sh.set_defaults(func=do_show)
    rs = nsub.add_parser("resend", help="deliver a notice again, even where it was already delivered")
    rs.add_argument("id", metavar="ID|KEY", help="the notice's id or key (as `notices list` shows them)")
    rs.add_argument("--channel", choices=deliver.CHANNELS, help="only this channel")
    rs.set_defaults(func=do_resend)
    rt = nsub.add_parser("retry", help="retry the deliveries that failed (for cron; `serve` does it by itself)",
                         description="Retry every failed delivery whose pause is over (never one delivered "
                                     "already); give up those past their deadline (a frost notice: the "
                                     "block's sunrise; a heat note: the end of its day) and send the farm's "
                                     "fallback recipients an 'undelivered' note. Exit 0 when nothing is left "
                                     "undelivered, 3 otherwise.")
    rt.add_argument("--now", action="store_true", help="retry at once, without waiting for the pauses")
    rt.set_defaults(func=do_retry)


def _night(text: str | None) -> dt.date | None:
    if not text:
        return None
    try:
        return dt.date.fromisoformat(text)
    except ValueError:
        raise InputError(f"'{text}' is not a date like 2026-04-06", field="--night") from None


def do_list(args) -> int:
    night = _night(args.night)
    db = Database(args.db)
    if args.undelivered:
        return _list_undelivered(db, args, night)
    with db.transaction() as s:
        blk = aliased(Block)
        q = _selected(select(Notice, Farm.name, blk.name), blk, args, night)
        q = q.order_by(Notice.night.desc(), Farm.name, blk.name, Notice.revision).limit(max(1, args.limit))
        rows = s.execute(q).all()
        ids = [n.id for n, _, _ in rows]
        dels: dict[int, list[Delivery]] = {}
        if ids:
            for d in s.scalars(select(Delivery).where(Delivery.notice_id.in_(ids))):
                dels.setdefault(d.notice_id, []).append(d)
        table = []
        for n, farm, block in rows:
            level = (n.content or {}).get("level_name") or n.level or "-"
            summ = deliver.delivery_summary(dels.get(n.id, []))
            table.append((str(n.id), n.night.isoformat(), n.kind, farm, block or "(farm summary)",
                          f"r{n.revision}" + ("*" if n.is_update else ""), level,
                          ", ".join(f"{ch} {st}" for ch, st in sorted(summ.items())) or "not delivered"))
    if not table:
        print("no notices" + (" match" if (args.farm or night or args.block) else " yet (run `advisory night run`)"))
        return 0
    header = ("id", "night", "kind", "farm", "block", "rev", "level", "deliveries")
    widths = [max(len(str(x)) for x in col) for col in zip(header, *table, strict=False)]
    for line in (header, *table):
        print("  ".join(str(x).ljust(wd) for x, wd in zip(line, widths, strict=True)).rstrip())
    print("(* = update to the evening notice)")
    return 0


def _selected(q, blk, args, night):
    """``q`` over notices joined to their farm and (aliased) block, narrowed by --farm, --night and --block."""
    q = q.join(Farm, Notice.farm_id == Farm.id).outerjoin(blk, Notice.block_id == blk.id)
    if args.farm:
        q = q.where(Farm.name == args.farm)
    if night:
        q = q.where(Notice.night == night)
    if args.block:
        q = q.where(blk.name == args.block)
    return q


def _list_undelivered(db, args, night) -> int:
    with db.transaction() as s:
        ids = None
        if args.farm or night or args.block:
            blk = aliased(Block)
            ids = list(s.scalars(_selected(select(Notice.id), blk, args, night)))
        items = retry_queue.undelivered(s, ids)
        fallback = {}
        if items:
            for d in s.scalars(select(Delivery).where(Delivery.notice_id.in_({it.notice_id for it in items}),
                                                      Delivery.channel.like(f"{retry_queue.FALLBACK}%"))):
                fallback.setdefault(d.notice_id, []).append(f"{d.channel[len(retry_queue.FALLBACK):]} {d.status}")
    if not items:
        print("every notice reached each of its recipients on at least one channel")
        return 0
    shown = items[:max(1, args.limit)]
    for it in shown:
        state = "given up" if it.status == retry_queue.EXPIRED else "retrying"
        note = f"; undelivered note: {', '.join(fallback[it.notice_id])}" if it.notice_id in fallback else ""
        print(f"{it.notice_id:>6}  {state:<8}  {it.line()}{note}")
    if len(items) > len(shown):
        print(f"... and {len(items) - len(shown)} more")
    return 0


def do_retry(args) -> int:
    cfg = settings_mod.load(args.db)
    db = Database(args.db)
    with db.transaction() as s:
        kw = {"attempted_before": dt.datetime.now(dt.UTC)} if args.now else {}
        report = retry_queue.retry_failed(s, cfg, **kw)
    print(report.text())
    with db.transaction() as s:
        left = retry_queue.undelivered(s)
    for it in left:
        if it.status != retry_queue.EXPIRED:
            print(f"  {it.line()}")
    return UNDELIVERED_EXIT if left else 0


#: Exit status of a command that finished but left notices undelivered (see the README).
UNDELIVERED_EXIT = 3


def _get(s, ref) -> Notice:
    text = str(ref).strip()
    if text.isdigit():
        n = s.get(Notice, int(text))
        what = f"id {text}"
    else:
        n = s.scalar(select(Notice).where(Notice.key == text))
        what = f"key {text!r}"
    if n is None:
        raise NotFoundError(f"no notice with {what} (see `advisory notices list`)", field="ID")
    return n


def do_show(args) -> int:
    db = Database(args.db)
    with db.transaction() as s:
        content = dict(_get(s, args.id).full_content)
    chart_src = None
    if args.format == "html":
        from advisory.notices.charts import chart_png, data_uri

        png = chart_png(as_notice(content))
        chart_src = data_uri(png) if png else None
    out = render(content, args.format, chart_src=chart_src)
    print(out, end="" if out.endswith("\n") else "\n")
    return 0


def do_resend(args) -> int:
    cfg = settings_mod.load(args.db)
    db = Database(args.db)
    with db.transaction() as s:
        n = _get(s, args.id)
        if n.block_id is not None:
            recips = list(s.get(Block, n.block_id).recipients)
        else:
            recips = list(s.scalars(select(Recipient).where(Recipient.farm_id == n.farm_id)))
        print(f"resending notice {n.id} ({n.key}) by {args.channel or 'every channel'}: the rule that skips "
              "recipients who already have it is bypassed on purpose")
        made = deliver.deliver_notice(s, n, recips, cfg, channels=[args.channel] if args.channel else None,
                                      force=True)
        names = {r.id: r.name for r in recips}
        last: dict[tuple, deliver.Attempt] = {}
        for d in made:
            who = "outbox" if d.recipient_id is None else names.get(d.recipient_id, str(d.recipient_id))
            print(f"  {d.channel:<8} {who:<28} attempt {d.attempt}: {d.status}"
                  + (f" ({d.error})" if d.error else ""))
            last[(d.recipient_id, d.channel)] = d
    if not made:
        print("  nothing to send: no recipient has that channel")
    return 1 if any(d.status == "failed" for d in last.values()) else 0
