"""Command-line values checked at the edge, before any work (used by :mod:`.cli`).

A bad value is a usage error (exit 2) with a message saying what is wrong:
counts below 1 or above the limits, a seed out of range, a scheduler that is
not ``local:N`` or an address, a ``--memory`` that is not a positive size or is
more than the machine has.  A value that starts with ``-`` is read as a value
(``--memory -5G`` is refused as not a positive size, not as "expected one
argument").  ``--workers`` above the cores this process may use is lowered to
one per core, with a notice (results never depend on the count).
"""

from __future__ import annotations

import argparse
import logging


def check_options(args, parser):
    """Command-line values: a bad one is a usage error (exit 2) with a message."""
    from .inputs.settings import MAX_RESAMPLES
    for name in ("resamples", "workers"):
        v = getattr(args, name, None)
        if v is not None and v < 1:
            parser.error(f"--{name} must be at least 1, got {v}")
    if getattr(args, "resamples", None) is not None and args.resamples > MAX_RESAMPLES:
        parser.error(f"--resamples must be at most {MAX_RESAMPLES:,}, got {args.resamples}")
    from .stats.engine.scheduler import parse_scheduler
    from .stats.engine.memory import parse_size
    if getattr(args, "scheduler", None) is not None:
        try:
            parse_scheduler(args.scheduler)
        except ValueError as exc:
            parser.error(f"--scheduler: {exc}")
    if getattr(args, "memory", None) is not None:
        try:
            args.memory = parse_size(args.memory)
        except ValueError as exc:
            parser.error(f"--memory: {exc}")
        from .stats.engine.memory import physical_memory, size_text
        total = physical_memory()
        if total and args.memory > total:
            parser.error(f"--memory: {size_text(args.memory)} is more than this machine's "
                         f"memory ({size_text(total)}); the bound is for this run's working "
                         "set: give a size below that, or leave --memory out")
    if getattr(args, "command", None) == "cache" and args.limit is not None:
        try:
            args.limit = parse_size(args.limit)
        except ValueError as exc:
            parser.error(f"--limit: {exc}")
    from .stats.inference import SEED_LIMIT
    seed = getattr(args, "seed", None)
    if seed is not None and not 0 <= seed < SEED_LIMIT:
        parser.error(f"--seed must be a whole number from 0 to {SEED_LIMIT - 1}, got {seed}")


#: options that take a value which may start with '-' (a mistyped "--memory -5G" is
#: then checked as a value and refused with its reason, not as "expected one argument")
_VALUE_OPTIONS = ("--memory", "--scheduler", "--resamples", "--seed", "--workers", "--out",
                  "--cohort-dir", "--contrast", "--limit", "--folder", "--mask")


def dash_values(argv, parser) -> list:
    """``--memory -5G`` -> ``--memory=-5G`` when ``-5G`` is not an option of ours."""
    known = set()
    for action in parser._actions:
        known.update(action.option_strings)
        for sub in (getattr(action, "choices", None) or {}).values():
            if isinstance(sub, argparse.ArgumentParser):
                known.update(o for a in sub._actions for o in a.option_strings)
    out, i = [], 0
    while i < len(argv):
        a = str(argv[i])
        if a in _VALUE_OPTIONS and i + 1 < len(argv) and str(argv[i + 1]).startswith("-") \
                and str(argv[i + 1]) not in known:
            out.append(f"{a}={argv[i + 1]}")
            i += 2
            continue
        out.append(argv[i])
        i += 1
    return out


def cap_workers(args):
    """``--workers`` above the cores this process may use: use one per core, and say so
    (results never depend on the count; every thread holds its own scoring arrays)."""
    from .stats.engine.scheduler import cap_threads
    n = getattr(args, "workers", None)
    if n is None:
        return
    use, why = cap_threads(n)
    if why:
        logging.getLogger("groupsrc").info(f"--workers {n}: using {use}, one per core ({why})")
        args.workers = use
