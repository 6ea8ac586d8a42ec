"""The `riskbound` command: one entry for the offline tools and the operator's helpers.

Only the chosen subcommand's module is imported, so `riskbound --help` is fast and the offline
tools do not need a ROS install unless they talk to a ROS graph.
"""

import argparse
import importlib
import sys

# name → (module, help). Each module provides `add_arguments(parser)` and `run(args) -> int`.
SUBCOMMANDS = {
    "demo": ("riskbound.demo", "run the planner on a scripted plaza crossing and write a PNG and a summary"),
    "bench": ("riskbound.bench", "benchmarks: planner solve times and others; prints figures, writes JSON/PNG"),
    "tune": ("riskbound.ros.tune", "show a running node's settings, read one, or apply NAME=VALUE changes"),
    "switch": ("riskbound.ros.switch", "show a managed node's lifecycle state or move it: configure, activate, ..."),
    "crowd": ("riskbound.crowd.cli", "generate a synthetic crowd bag from a scenario file"),
    "bagcheck": ("riskbound.crowd.bag_check", "read a crowd bag completely and summarise it (exit 2 if damaged)"),
    "review": ("riskbound.logs.review.cli", "find near-misses in a recorded bag, explain them, replan them"),
    "launch": ("riskbound.launch_runner", "run a ROS 2 XML launch file of this package without the ROS launch tools"),
    "closedloop": ("riskbound.closed_loop", "replay a crowd bag through the full stack with a simulated robot and report"),
    "sweep": ("riskbound.sweep.cli", "closed loops over a grid (α, scenario, seed, ...) on Dask; SQLite results, report"),
    "fleetreview": ("riskbound.logs.fleet_review", "review every bag under a directory on Dask; per-bag reports, a table"),
}


def main(argv=None):
    width = max(len(name) for name in SUBCOMMANDS)
    listing = "\n".join(f"  {name:<{width}} {help_text}" for name, (_, help_text) in SUBCOMMANDS.items())
    parser = argparse.ArgumentParser(prog="riskbound", description=__doc__.splitlines()[0],
                                     epilog="commands:\n" + listing,
                                     formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("command", choices=sorted(SUBCOMMANDS), metavar="COMMAND", help="see the list below")
    parser.add_argument("rest", nargs=argparse.REMAINDER, help="the command's own arguments (COMMAND --help)")
    args = parser.parse_args(argv)
    module_name, help_text = SUBCOMMANDS[args.command]
    module = importlib.import_module(module_name)
    sub_parser = argparse.ArgumentParser(prog=f"riskbound {args.command}", description=help_text)
    module.add_arguments(sub_parser)
    try:
        return module.run(sub_parser.parse_args(args.rest))
    except KeyboardInterrupt:
        return 130


if __name__ == "__main__":
    sys.exit(main())
