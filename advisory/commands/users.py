"""`advisory users add|list|remove`: who may sign in to the web console."""

from __future__ import annotations

import getpass
import sys

from sqlalchemy import select

from advisory.errors import InputError, NotFoundError
from advisory.store.db import Database
from advisory.store.schema import Farm, WebUser, WebUserFarm


def register(sub) -> None:
    p = sub.add_parser("users", help="web console users: add, list, remove")
    usub = p.add_subparsers(dest="users_command", metavar="ACTION")
    usub.required = True
    add = usub.add_parser("add", help="add a user (the password is asked for, or read from standard input)")
    add.add_argument("name", metavar="NAME")
    add.add_argument("--role", choices=("agent", "grower"), required=True,
                     help="agent: the farms given (or all); grower: one farm, read and its recipients")
    add.add_argument("--farm", action="append", default=[], metavar="FARM",
                     help="a farm of this user (repeat for an agent's several farms)")
    add.add_argument("--all-farms", action="store_true", help="an agent who sees every farm")
    add.add_argument("--password-stdin", action="store_true",
                     help="read the password from the first line of standard input (no prompt)")
    add.set_defaults(func=do_add)
    ls = usub.add_parser("list", help="list users with their role and farms")
    ls.set_defaults(func=do_list)
    rm = usub.add_parser("remove", help="remove a user (the audit trail keeps their name)")
    rm.add_argument("name", metavar="NAME")
    rm.set_defaults(func=do_remove)


def _password(args) -> str:
    if args.password_stdin:
        return sys.stdin.readline().rstrip("\r\n")
    if not sys.stdin.isatty():
        raise InputError("no terminal to ask for the password: use --password-stdin", field="--password-stdin")
    first = getpass.getpass("password: ")
    if first != getpass.getpass("again: "):
        raise InputError("the two passwords differ", field="password")
    return first


def do_add(args) -> int:
    from advisory.web.auth import add_user

    password = _password(args)
    db = Database(args.db)
    with db.transaction() as s:
        user = add_user(s, args.name, password, args.role, args.farm, args.all_farms)
        where = "every farm" if user.all_farms else ", ".join(args.farm)
    print(f"user {args.name} added: {args.role} of {where}")
    return 0


def do_list(args) -> int:
    db = Database(args.db)
    with db.transaction() as s:
        users = list(s.scalars(select(WebUser).order_by(WebUser.username)))
        names = dict(s.execute(select(Farm.id, Farm.name)).all())
        given: dict[int, list[str]] = {}
        for uid, fid in s.execute(select(WebUserFarm.user_id, WebUserFarm.farm_id)):
            given.setdefault(uid, []).append(names.get(fid, str(fid)))
        rows = []
        for u in users:
            farms = ("every farm" if u.all_farms else
                     names.get(u.farm_id, "-") if u.role == "grower" else ", ".join(sorted(given.get(u.id, []))))
            rows.append((u.username, u.role, farms, u.created_at.strftime("%Y-%m-%d")))
    if not rows:
        print("no users yet (add one with `advisory users add NAME --role agent --all-farms`)")
        return 0
    header = ("user", "role", "farms", "added")
    widths = [max(len(str(x)) for x in col) for col in zip(header, *rows, strict=False)]
    for line in (header, *rows):
        print("  ".join(str(x).ljust(w) for x, w in zip(line, widths, strict=True)).rstrip())
    return 0


def do_remove(args) -> int:
    db = Database(args.db)
    with db.transaction() as s:
        user = s.scalar(select(WebUser).where(WebUser.username == args.name))
        if user is None:
            raise NotFoundError(f"no user named '{args.name}' (see `advisory users list`)", field="NAME")
        s.delete(user)
    print(f"user {args.name} removed")
    return 0
