"""The ``branchwatch`` command line.

Each verb is a thin layer: parse arguments, call the job or model function, print a
readable table (or JSON with ``--json``). Errors a user can fix — a bad config, an
unreachable database, an impossible what-if — print one line naming the cause and exit
with status 2; a bug still shows its traceback.
"""

from __future__ import annotations

import argparse
import json
import logging
import sys
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

from adapters.base import BranchwatchAdapterError
from adapters.units import UnitError, parse_quantity
from monitor.config import ConfigError, Site, load_site

log = logging.getLogger(__name__)

EXIT_OK = 0
EXIT_FINDINGS = 1  # reserved: a check that ran and found problems
EXIT_USAGE = 2

_DESCRIPTION = """\
branchwatch watches the branches of a cooling-water (or any liquid) supply header.
It fits each branch's hydraulic resistance from logged header pressure and branch
flows, tracks it over months, tells fouling from a throttled valve, a back-pressure
change or a faulty meter, raises low-flow alarms, and writes a morning report.

It advises; it does not control. Decisions on isolation, cleaning and set points follow
your site's procedures and the judgement of qualified people.
"""

_EPILOG = """\
typical first steps:
  branchwatch demo                               build a demo site and show everything
  branchwatch check  config/example-site.toml    validate a site file, reach its data
  branchwatch curve  config/example-site.toml    predicted flows at the pump operating point
  branchwatch curve  config/example-site.toml --speed 85 --plot curve.png

Run 'branchwatch VERB --help' for each verb's options.
"""


class UserError(Exception):
    """An error the user can fix; printed as one line, exit status 2."""


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``branchwatch`` console script."""
    parser = _parser()
    args = parser.parse_args(argv)
    logging.basicConfig(
        level=logging.DEBUG if args.verbose else logging.INFO if args.log else logging.WARNING,
        format="%(asctime)s %(levelname)-7s %(name)s: %(message)s",
    )
    if not getattr(args, "func", None):
        parser.print_help()
        return EXIT_USAGE
    try:
        return int(args.func(args) or EXIT_OK)
    except (UserError, ConfigError, UnitError, BranchwatchAdapterError) as exc:
        print(f"branchwatch {args.verb}: error: {exc}", file=sys.stderr)
        return EXIT_USAGE
    except KeyboardInterrupt:
        print(f"branchwatch {args.verb}: interrupted; what was stored is kept", file=sys.stderr)
        return 130


def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="branchwatch",
        description=_DESCRIPTION,
        epilog=_EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("-v", "--verbose", action="store_true", help="debug logging")
    parser.add_argument("--log", action="store_true", help="informational logging")
    verbs = parser.add_subparsers(dest="verb", metavar="VERB")
    for register in _VERBS:
        register(verbs)
    return parser


def _add_verb(
    verbs: Any, name: str, func: Callable[[argparse.Namespace], int | None], summary: str,
    description: str, *, config: bool = True,
) -> argparse.ArgumentParser:
    p: argparse.ArgumentParser = verbs.add_parser(
        name, help=summary, description=description,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    if config:
        p.add_argument("config", metavar="CONFIG", type=Path, help="site file (TOML)")
    p.set_defaults(func=func)
    return p


def _site(args: argparse.Namespace) -> Site:
    return load_site(args.config)


# ---------------------------------------------------------------------------------------
# curve


def _register_curve(verbs: Any) -> None:
    p = _add_verb(
        verbs, "curve", _cmd_curve, "system curve, pump operating point and branch split",
        """\
Predict, from the site file alone, where the pumps and the branches settle: the header
pressure, the total flow, and each branch's flow, velocity, share and threshold pressure
(the header pressure below which that branch gets no flow). A what-if tool: change the
pump speed, fix the header pressure, or change the water temperature.

Logged conditions (tank levels, return-header pressure, valve positions) take the
'nominal' values of their tags in the site file.

examples:
  branchwatch curve site.toml
  branchwatch curve site.toml --speed 80 --plot curve.png
  branchwatch curve site.toml --header-pressure "3.2 bar" --json""",
    )
    p.add_argument("--speed", metavar="PCT", type=float,
                   help="pump speed in %% of design (affinity laws); default: design speed")
    p.add_argument("--header-pressure", metavar="P",
                   help='fix the header pressure instead of solving with the pump, e.g. "3 bar"')
    p.add_argument("--temperature", metavar="T",
                   help='water temperature, e.g. "30 degC"; default: the design temperature')
    p.add_argument("--plot", metavar="FILE", type=Path, help="write a PNG of the curves")
    p.add_argument("--json", action="store_true", help="print JSON instead of a table")


def _cmd_curve(args: argparse.Namespace) -> int:
    from monitor.whatif import CurveRequest, solve_curve

    site = _site(args)
    request = CurveRequest(
        speed_ratio=None if args.speed is None else args.speed / 100.0,
        header_pressure_pa=None if args.header_pressure is None
        else parse_quantity(args.header_pressure, "Pa"),
        temperature_c=None if args.temperature is None
        else parse_quantity(args.temperature, "degC"),
    )
    result = solve_curve(site, request)
    if not result.ok:
        raise UserError(result.message)
    if args.plot:
        from monitor.plots import plot_system_curve

        plot_system_curve(site, result, args.plot)
    if args.json:
        print(json.dumps(result.to_json_dict(), indent=2))
    else:
        print(result.table())
        if args.plot:
            print(f"\nplot written to {args.plot}")
    return EXIT_OK


_VERBS: list[Callable[[Any], None]] = [_register_curve]


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
