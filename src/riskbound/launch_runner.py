"""`riskbound launch FILE [name:=value ...]`: run a ROS 2 XML launch file of this package without
the ROS launch tools (the standalone install has none).

FILE is a path or the name of a file in the package's launch directory (launch/stack.launch.xml,
launch/crowd_replay.launch.xml). The supported subset of the format is listed in
riskbound.launching.xml_description, the process rules in riskbound.launching.processes.

Exit codes: 0 the launch ended as asked (Ctrl-C, SIGTERM, a node with on_exit="shutdown"
finished); 1 a node failed or did not stop in time; 2 the launch file or its arguments are wrong
or an executable is missing (nothing was started).
"""

import os
import re
import sys
import time
from pathlib import Path

from riskbound.launching.executables import node_command
from riskbound.launching.processes import ProcessSpec, Supervisor
from riskbound.launching.xml_description import (LaunchDescription, LaunchFileError, declared_arguments,
                                                 resolve_launch_file)

EXIT_USAGE = 2
_ARGUMENT = re.compile(r"^([A-Za-z_][\w-]*):=(.*)$", re.DOTALL)


def add_arguments(parser):
    parser.epilog = ("exit codes: 0 the launch ended as asked (Ctrl-C, SIGTERM, an on_exit=\"shutdown\" node "
                     "finished); 1 a node failed or did not stop in time; 2 a wrong launch file, argument or "
                     "option, or a missing executable (nothing started)")
    parser.add_argument("file", help="launch file: a path, or a name in the package's launch directory")
    parser.add_argument("arguments", nargs="*", metavar="name:=value", help="launch arguments")
    parser.add_argument("--arguments", action="store_true", dest="list_arguments",
                        help="list the file's launch arguments (default, description) and exit")
    parser.add_argument("--dry-run", action="store_true",
                        help="print each node's command line and exit without starting anything")
    parser.add_argument("--log-dir", default=None,
                        help="directory for the nodes' logs (default: $ROS_LOG_DIR or ~/.ros/log, in a "
                             "riskbound_launch_<time>_<pid> subdirectory)")
    parser.add_argument("--sigint-timeout-s", type=float, default=5.0,
                        help="wait this long after SIGINT before SIGTERM when stopping nodes (default 5)")
    parser.add_argument("--sigterm-timeout-s", type=float, default=5.0,
                        help="wait this long after SIGTERM before SIGKILL (default 5)")


def parse_launch_arguments(words):
    """{name: value} from name:=value words; ValueError naming a malformed one."""
    values = {}
    for word in words:
        match = _ARGUMENT.match(word)
        if not match:
            raise ValueError(f"launch argument {word!r} is not of the form name:=value")
        values[match.group(1)] = match.group(2)
    return values


def _default_log_dir():
    base = Path(os.environ.get("ROS_LOG_DIR") or Path.home() / ".ros" / "log")
    return base / time.strftime(f"riskbound_launch_%Y%m%d_%H%M%S_{os.getpid()}")


def run(args):
    for name in ("sigint_timeout_s", "sigterm_timeout_s"):
        if not getattr(args, name) > 0.0:
            print(f"riskbound launch: error: --{name.replace('_', '-')}={getattr(args, name)} must be > 0",
                  file=sys.stderr)
            return EXIT_USAGE
    try:
        path = resolve_launch_file(args.file)
        if args.list_arguments:
            for argument in declared_arguments(path):
                default = "(required)" if argument.default is None else f"(default: {argument.default!r})"
                print(f"{argument.name} {default}\n    {argument.description}")
            return 0
        description = LaunchDescription(path, parse_launch_arguments(args.arguments))
        specs = [ProcessSpec(node.label, node_command(node), node.environment, node.output, node.on_exit_shutdown)
                 for node in description.nodes]
    except (LaunchFileError, ValueError) as error:
        print(f"riskbound launch: error: {error}", file=sys.stderr)
        return EXIT_USAGE
    labels = [spec.label for spec in specs]
    duplicates = sorted({label for label in labels if labels.count(label) > 1})
    if duplicates:
        print(f"riskbound launch: error: {path.name}: more than one node named {', '.join(duplicates)}",
              file=sys.stderr)
        return EXIT_USAGE
    if args.dry_run:
        for spec in specs:
            print(f"{spec.label}: {' '.join(spec.command)}")
        return 0
    if not specs:
        print(f"riskbound launch: {path.name} starts no node")
        return 0
    log_dir = Path(args.log_dir) if args.log_dir else _default_log_dir()
    supervisor = Supervisor(specs, log_dir, args.sigint_timeout_s, args.sigterm_timeout_s)
    supervisor.say(f"{path}: {len(specs)} nodes, logs in {log_dir}")
    return supervisor.run()
