"""The ``rwls`` command line: offline ``replay`` and ``fit`` of CSV histories, ``check-config``.

Exit status: 0 done, 1 the data file cannot be used, 2 bad usage or configuration.
Bad rows never fail a run; they are counted and listed with their line numbers.
"""

from __future__ import annotations

import argparse
import json
import logging
import sys
from collections.abc import Sequence

from service.config import ConfigError, RwlsConfig, load_config
from service.csvdata import CsvError
from service.replay import RunResult, fit_file, replay_file
from service.tables import render_text

__all__ = ["main"]

log = logging.getLogger("rwls")

ADVISORY = ("rwls is an advisory monitoring aid, not a safety function; "
            "follow the site's alarm philosophy, local codes and licensed practice.")


def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="rwls", description="Recursive weighted least squares for sensor monitoring. " + ADVISORY)
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    for name, helptext in (("replay", "run a CSV history through the recursive estimator"),
                           ("fit", "batch closed-form WLS on a CSV history (commissioning baseline)")):
        cmd = sub.add_parser(name, help=helptext, description=helptext)
        cmd.add_argument("data", help="CSV file: header row; y, inputs, optional t, sigma, weight, channel")
        cmd.add_argument("-c", "--config", required=True, help="TOML file with [channels.<id>] tables")
        cmd.add_argument("--json", action="store_true", help="print the result as JSON")
        cmd.add_argument("--forgetting-factor", type=float, metavar="LAMBDA",
                         help="override every channel's forgetting factor, to compare settings")
        cmd.add_argument("--no-progress", action="store_true", help="never show the progress bar")

    check = sub.add_parser("check-config", help="validate a configuration file and explain errors by key")
    check.add_argument("config", help="TOML file")
    return parser


def _with_forgetting(config: RwlsConfig, value: float | None) -> RwlsConfig:
    if value is None:
        return config
    if not (0.0 < value <= 1.0):
        raise ConfigError([f"--forgetting-factor: must be in (0, 1], got {value}"])
    channels = {cid: ch.model_copy(update={"forgetting_factor": value}) for cid, ch in config.channels.items()}
    return config.model_copy(update={"channels": channels})


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``rwls`` console script; returns the exit status."""
    logging.basicConfig(level=logging.WARNING, format="%(levelname)s %(name)s: %(message)s")
    args = _parser().parse_args(argv)
    try:
        if args.command == "check-config":
            config = load_config(args.config)
            print(f"{args.config}: ok, {len(config.channels)} channel(s): {', '.join(config.channels)}")
            return 0
        config = _with_forgetting(load_config(args.config), args.forgetting_factor)
        run = replay_file if args.command == "replay" else fit_file
        result: RunResult = run(args.data, config, show_progress=False if args.no_progress else None)
    except ConfigError as exc:
        print("configuration error:", file=sys.stderr)
        for problem in exc.problems:
            print(f"  {problem}", file=sys.stderr)
        return 2
    except CsvError as exc:
        print(f"data error: {exc}", file=sys.stderr)
        return 1
    if args.json:
        json.dump(result.to_json(), sys.stdout, indent=2, allow_nan=False)
        sys.stdout.write("\n")
    else:
        sys.stdout.write(render_text(result, args.command))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
