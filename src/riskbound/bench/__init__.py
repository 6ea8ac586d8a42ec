"""`riskbound bench NAME`: benchmarks that print figures (ratios where possible) and write JSON/PNG.

Each benchmark module provides `add_arguments(parser)` and `run(args) -> int`. Benchmarks are
commands, never timed unit tests: these machines are noisy.
"""

import argparse
import importlib

# name → module. Add one line per benchmark.
BENCHMARKS = {
    "planner": "riskbound.bench.planner",
    "risk": "riskbound.bench.risk",
    "compare": "riskbound.bench.compare",
    "faults": "riskbound.ros.fault_benchmark",
    "tracker": "riskbound.bench.tracker",
    "crowdloop": "riskbound.bench.crowd_loop",
    "crowdsuite": "riskbound.bench.crowd_suite",
}


def add_arguments(parser):
    parser.add_argument("name", choices=sorted(BENCHMARKS), help="which benchmark to run")
    parser.add_argument("rest", nargs=argparse.REMAINDER, help="options of that benchmark (see NAME --help)")


def run(args):
    module = importlib.import_module(BENCHMARKS[args.name])
    parser = argparse.ArgumentParser(prog=f"riskbound bench {args.name}")
    module.add_arguments(parser)
    return module.run(parser.parse_args(args.rest))
