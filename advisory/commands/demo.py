"""`advisory demo`: the main job on the invented demo farm."""

from __future__ import annotations

from pathlib import Path

from advisory import demo


def register(sub) -> None:
    p = sub.add_parser("demo", help="run the main job on the invented demo farm")
    p.add_argument("--out", type=Path, default=demo.DEFAULT_OUT,
                   help=f"demo folder for the database and outbox (default: {demo.DEFAULT_OUT})")
    p.set_defaults(func=run)


def run(args) -> int:
    paths = demo.prepare(args.out, args.db if args.db_explicit else None)
    print(f"demo folder: {paths.out}")
    demo.run(paths)
    return 0
