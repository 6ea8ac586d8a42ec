"""The `riskbound` command: one entry for the offline tools and the operator's helpers.

Subcommands import their modules lazily so that `riskbound --help` is fast and the offline tools
do not need a ROS install unless they talk to a ROS graph.
"""

import argparse
import importlib
import sys

# name → (module, help). Each module provides `add_arguments(parser)` and `run(args) -> int`.
SUBCOMMANDS = {
    "demo": ("riskbound.demo", "run the planner on a scripted plaza crossing and write a PNG and a summary"),
    "bench": ("riskbound.bench", "benchmarks: planner solve times and others; prints figures, writes JSON/PNG"),
    "param": ("riskbound.ros.param_client", "get, set or list a running node's parameters"),
}


def build_parser():
    parser = argparse.ArgumentParser(prog="riskbound", description=__doc__.splitlines()[0])
    sub = parser.add_subparsers(dest="command", required=True)
    for name, (module_name, help_text) in SUBCOMMANDS.items():
        sub_parser = sub.add_parser(name, help=help_text, description=help_text)
        sub_parser.set_defaults(_module=module_name)
        importlib.import_module(module_name).add_arguments(sub_parser)
    return parser


def main(argv=None):
    args = build_parser().parse_args(argv)
    try:
        return importlib.import_module(args._module).run(args)
    except KeyboardInterrupt:
        return 130


if __name__ == "__main__":
    sys.exit(main())
