"""Subcommands about the scheme itself rather than its numbers:
``treeflux equilibrium`` (the detailed-balance restriction as a model file)
and ``treeflux draw`` (a picture of the scheme).

:func:`register` adds them to the main parser; errors are TreefluxErrors,
which the main command prints as one line with exit status 2.
"""

from __future__ import annotations



def cmd_equilibrium(args) -> int:
    from treeflux.runtime.safe_io import check_target, write_file

    from .balance import equilibrium_restriction
    from .cli import emit_json, load_model
    from .writer import model_text

    check_target(args.out)
    scheme = load_model(args.model)
    restricted = equilibrium_restriction(scheme)
    note = (f"Equilibrium restriction of {scheme.origin}: every basis cycle balances identically.\n"
            f"Rates fixed by their cycle's Kolmogorov condition: "
            f"{', '.join(restricted.restricted_edges) or 'none (the scheme already balances)'}.")
    write_file(args.out, model_text(restricted, comment=note))
    if args.json:
        emit_json({"model": str(args.model), "out": str(args.out),
                   "fixed_edges": restricted.restricted_edges,
                   "states": len(restricted.states), "edges": len(restricted.edges)})
    else:
        print(f"wrote {args.out}: {len(restricted.states)} states, {len(restricted.edges)} edges; "
              f"fixed by detailed balance: {', '.join(restricted.restricted_edges) or 'none'}")
    return 0


def cmd_draw(args) -> int:
    from .cli import load_model
    from .draw import check_format, draw

    check_format(args.out)
    scheme = load_model(args.model)
    path = draw(scheme, args.out, highlight=args.highlight, labels=args.labels)
    print(f"wrote {path}")
    return 0


def register(sub) -> None:
    q = sub.add_parser("equilibrium", help="write the scheme restricted to detailed balance as a model file")
    q.add_argument("model")
    q.add_argument("-o", "--out", required=True, metavar="OUT.toml")
    q.add_argument("--json", action="store_true")
    q.set_defaults(handler=cmd_equilibrium)

    q = sub.add_parser("draw", help="draw the scheme (PNG or SVG)")
    q.add_argument("model")
    q.add_argument("-o", "--out", required=True, metavar="FILE.png|FILE.svg")
    q.add_argument("--highlight", choices=["none", "tree", "cycles"], default="none",
                   help="mark a spanning tree or the basis cycles")
    q.add_argument("--labels", choices=["auto", "all", "none"], default="auto",
                   help="rate labels on edges (auto: when there are at most 40 edges)")
    q.set_defaults(handler=cmd_draw)
