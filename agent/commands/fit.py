"""``lethe fit``: fit the memory model to the stored quiz answers and print it beside the baselines."""

from __future__ import annotations

from contextlib import contextmanager

from ._common import add_json, emit, home_from


def register(sub) -> None:
    p = sub.add_parser("fit", help="fit the memory model to your quiz answers (model vs baselines table)",
                       description="Fit the memory model to your memory-test answers, on this laptop, and "
                                   "print it beside its rivals. It needs at least 12 answers on 3 different "
                                   "days; before that it says how many there are (exit 5).")
    p.add_argument("--seed", type=int, default=0, help="seed for restarts, folds and bootstrap (default 0)")
    p.add_argument("--no-store", action="store_true", help="do not store the result in the vault")
    p.add_argument("--weights", choices=("auto", "grouped", "classes5", "classes2", "full"), default="auto",
                   help="type-pair weight grouping: auto (default) chooses among grouped, classes5 and "
                        "classes2 by recovery and held-out fit and says why; a name forces it: three "
                        "classes (time-place, place-context, non-place), five classes of kind families, "
                        "two (time-place, other), or one per kind pair")
    add_json(p)
    p.set_defaults(func=_fit)


def _fit(args) -> int:
    from ..model import fit_from_home

    home = home_from(args).require()
    with ticking("fitting the model on this laptop (with cross-validation and recovery)"):
        result = fit_from_home(home, None, seed=args.seed, store=not args.no_store, weights=args.weights)
    emit(args, result.to_dict(), result.table())
    return 0


@contextmanager
def ticking(desc: str):
    """A running clock on stderr while work without steps of its own runs (terminal only, tqdm)."""
    import threading

    from ._common import progress

    with progress(None, desc, unit="s") as bar:
        done = threading.Event()

        def tick():
            while not done.wait(0.5):
                bar.refresh()

        t = threading.Thread(target=tick, daemon=True)
        if not bar.disable:
            t.start()
        try:
            yield
        finally:
            done.set()
            if t.is_alive():
                t.join(2)
