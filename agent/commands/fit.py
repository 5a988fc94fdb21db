"""``lethe fit``: fit the memory model to the stored quiz answers and print it beside the baselines."""

from __future__ import annotations

from ._common import add_json, emit, home_from


def register(sub) -> None:
    p = sub.add_parser("fit", help="fit the memory model to your quiz answers (model vs baselines table)")
    p.add_argument("--seed", type=int, default=0, help="seed for restarts, folds and bootstrap (default 0)")
    p.add_argument("--no-store", action="store_true", help="do not store the result in the vault")
    add_json(p)
    p.set_defaults(func=_fit)


def _fit(args) -> int:
    from ..model import fit_from_home

    home = home_from(args).require()
    result = fit_from_home(home, None, seed=args.seed, store=not args.no_store)
    emit(args, result.to_dict(), result.table())
    return 0
