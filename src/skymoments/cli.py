"""The ``skymoments`` command: ``skymoments <subcommand> [hydra overrides]``."""

from __future__ import annotations

import importlib
import sys

SUBCOMMANDS = {
    "simulate": "draw samples of a scenario and write them to an .npz with a quick-look PNG",
    "synthesize": "enlarge one foreground image into a bank by wavelet phase harmonic synthesis",
    "run": "train the mean and variance networks, evaluate calibration, track it all in MLflow",
    "evaluate": "re-evaluate a tracked model on another validation scenario",
    "compare": "compare tracked runs side by side (terminal table and HTML report)",
    "predict": "apply a tracked model to new maps",
    "settle": "find runs whose process died (heartbeat stopped) and mark them KILLED",
}

USAGE = """usage: skymoments <subcommand> [key=value ...] [-m] [--help]

Subcommands take Hydra overrides, e.g.
  skymoments simulate experiment=quickstart n=8
  skymoments run experiment=quickstart
  skymoments run -m experiment=smoke model=unet,dilated_resnet

subcommands:
{rows}
"""


def _usage() -> str:
    rows = "\n".join(f"  {name:<11} {text}" for name, text in SUBCOMMANDS.items())
    return USAGE.format(rows=rows)


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    if not argv or argv[0] in {"-h", "--help", "help"}:
        print(_usage())
        return 0
    sub, rest = argv[0], argv[1:]
    if sub not in SUBCOMMANDS:
        print(f"skymoments: unknown subcommand {sub!r}\n", file=sys.stderr)
        print(_usage(), file=sys.stderr)
        return 2
    try:
        module = importlib.import_module(f"skymoments.commands.{sub}")
    except ModuleNotFoundError as err:
        if err.name == f"skymoments.commands.{sub}":
            print(
                f"skymoments: subcommand {sub!r} is not available in this version", file=sys.stderr
            )
            return 2
        raise
    sys.argv = [f"skymoments {sub}", *rest]
    module.main()
    return 0


if __name__ == "__main__":
    sys.exit(main())
