"""Hydra's composition errors (an unknown group option, a key not in the config, an
override that does not parse) as one line naming the fix, for every command."""

from __future__ import annotations

import contextlib
import os
import re
import sys

# Lines of Hydra's composition messages that describe Hydra itself, not what to fix.
_NOISE = re.compile(r"^(full_key:|object_type=|reference_type=|Config search path|provider=|See )")


def composition_message(err: BaseException) -> str:
    """One line saying what in the command line did not compose, and how to fix it.

    Hydra's own messages spread over several lines (the options, the search path, the
    omegaconf key and type); this keeps what names the problem and adds the fix.
    """
    from hydra.errors import MissingConfigException, OverrideParseException

    text = str(err)
    if isinstance(err, MissingConfigException) and err.options is not None:
        where = re.search(r"Could not (?:find|load) '([^']+)'", text)
        missing = where.group(1) if where else str(err.missing_cfg_file)
        group, _, name = missing.rpartition("/")
        if err.options:
            return (
                f"{group}={name}: there is no {group} config named {name!r}; choose one of "
                f"{', '.join(sorted(err.options))} (e.g. {group}={sorted(err.options)[0]})"
            )
        return f"{missing}: no such config; check the name (configs live in conf/)"
    override = re.search(r"Could not override '([^']+)'", text)
    if override:
        key = override.group(1)
        add = re.search(r"use (\+\S+)", text)
        cause = " ".join(str(err.__cause__ or "").split("\n")[:1]).strip()
        hint = f"fix its spelling, or add a new key with {add.group(1)}" if add else ""
        reason = f"the config has no key {key!r}" if "not in struct" in cause else cause
        return f"could not override {key!r}: {reason}" + (f"; {hint}" if hint else "")
    if isinstance(err, OverrideParseException):
        first = text.splitlines()[0] if text else "it does not parse"
        return (
            f"could not parse the override {err.override!r}: {first}; write each override as "
            "key=value (quote a value holding spaces or brackets), +key=value to add a key"
        )
    lines = [ln.strip() for ln in text.splitlines() if ln.strip() and not _NOISE.match(ln.strip())]
    cause = err.__cause__
    if cause is not None:
        lines += [
            ln.strip()
            for ln in str(cause).splitlines()
            if ln.strip() and not _NOISE.match(ln.strip()) and ln.strip() not in lines
        ]
    return "; ".join(ln.rstrip(".") for ln in lines) or type(err).__name__


@contextlib.contextmanager
def one_line_composition_errors(started: list[bool]):
    """While Hydra composes (before the task has started), turn its errors into one line on
    stderr and exit 2, the exit of every other refusal of bad input.

    Hydra reports every error through ``hydra._internal.utils.run_and_report``, which prints
    several lines and exits 1; that function is wrapped for the duration of the command.
    Errors once the task has started, and any error under ``HYDRA_FULL_ERROR=1``, are left to
    Hydra as before.
    """
    from hydra._internal import utils as hydra_utils
    from hydra.errors import HydraException
    from omegaconf.errors import OmegaConfBaseException

    original = hydra_utils.run_and_report

    def run_and_report(func):
        def guarded():
            try:
                return func()
            except (HydraException, OmegaConfBaseException, ValueError) as err:
                if started[0] or os.environ.get("HYDRA_FULL_ERROR") == "1":
                    raise
                print(f"skymoments: {composition_message(err)}", file=sys.stderr)
                sys.exit(2)

        return original(guarded)

    hydra_utils.run_and_report = run_and_report
    try:
        yield
    finally:
        hydra_utils.run_and_report = original
