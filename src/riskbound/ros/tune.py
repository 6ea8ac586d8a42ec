"""`riskbound param get|set|list NODE [NAME] [VALUE]`: a running node's parameters from the shell.

The standalone install has no `ros2 param`; this talks to the same rcl_interfaces services
(`<node>/get_parameters`, `set_parameters`, `list_parameters`, `describe_parameters`).

Exit codes: 0 done, 1 rejected or unknown parameter (the node's reason is printed),
2 the node's parameter services did not answer within --timeout-s.
"""

import os
import sys

import yaml

EXIT_OK, EXIT_REJECTED, EXIT_UNAVAILABLE = 0, 1, 2


class ServiceUnavailable(Exception):
    """The node's parameter services did not answer in time."""


def add_arguments(parser):
    parser.add_argument("action", choices=("get", "set", "list"), help="what to do")
    parser.add_argument("node", help="node name, relative ('planner') or absolute ('/robot1/planner')")
    parser.add_argument("name", nargs="?", help="parameter name (get, set)")
    parser.add_argument("value", nargs="?", help="new value (set), read as YAML: 0.02, true, joint")
    parser.add_argument("--timeout-s", type=float, default=5.0,
                        help="how long to wait for the node's parameter services [s] (default 5)")


def parse_value(text, current_type=None):
    """Python value for `text` (YAML scalar), made to fit the parameter's current type where that
    is unambiguous: an integer for a double parameter becomes a float ("1" → 1.0), anything for a
    string parameter stays the text as typed, "1e-3" is a number. Otherwise the YAML type stands.

    current_type: rcl_interfaces/ParameterType value, or None when unknown.
    """
    from rcl_interfaces.msg import ParameterType

    if current_type == ParameterType.PARAMETER_STRING:
        return text
    try:
        value = yaml.safe_load(text)
    except yaml.YAMLError:
        return text
    if isinstance(value, str):
        # YAML 1.1 reads "1e-3" (no dot in the mantissa) as a string; an operator means a number.
        try:
            return float(text)
        except ValueError:
            return text
    if value is None or isinstance(value, (list, dict)):
        return text
    if current_type == ParameterType.PARAMETER_DOUBLE and isinstance(value, int) and not isinstance(value, bool):
        return float(value)
    return value


def format_value(parameter_value):
    """Text of an rcl_interfaces/ParameterValue as the user would type it back."""
    from rclpy.parameter import parameter_value_to_python

    value = parameter_value_to_python(parameter_value)
    if isinstance(value, bool):
        return "true" if value else "false"
    return str(value)


def _type_words(type_value):
    from rcl_interfaces.msg import ParameterType

    words = {ParameterType.PARAMETER_BOOL: "a bool", ParameterType.PARAMETER_INTEGER: "an integer",
             ParameterType.PARAMETER_DOUBLE: "a double", ParameterType.PARAMETER_STRING: "a string"}
    return words.get(type_value, "a non-scalar")


class _Session:
    """A short-lived client node bound to one remote node's parameter services."""

    def __init__(self, node_name, timeout_s):
        import rclpy
        from rclpy.parameter_client import AsyncParameterClient

        self._rclpy = rclpy
        self._timeout_s = timeout_s
        self.remote = node_name if node_name.startswith("/") else "/" + node_name
        rclpy.init(args=[])
        self.node = rclpy.create_node(f"riskbound_param_client_{os.getpid()}", start_parameter_services=False)
        self.client = AsyncParameterClient(self.node, self.remote)

    def wait(self):
        if not self.client.wait_for_services(timeout_sec=self._timeout_s):
            raise ServiceUnavailable(f"{self.remote}: parameter services not available within "
                                     f"{self._timeout_s:g} s (is the node running, with the same "
                                     "ROS_DOMAIN_ID?)")

    def call(self, future):
        self._rclpy.spin_until_future_complete(self.node, future, timeout_sec=self._timeout_s)
        if not future.done() or future.result() is None:
            raise ServiceUnavailable(f"{self.remote}: no answer within {self._timeout_s:g} s")
        return future.result()

    def close(self):
        self.node.destroy_node()
        self._rclpy.try_shutdown()


def _current_value(session, name):
    """The parameter's ParameterValue, or None (with a message) when the node has no such parameter."""
    from rcl_interfaces.msg import ParameterType

    values = session.call(session.client.get_parameters([name])).values
    if not values or values[0].type == ParameterType.PARAMETER_NOT_SET:
        print(f"{session.remote} has no parameter {name!r}", file=sys.stderr)
        return None
    return values[0]


def _get(session, name):
    current = _current_value(session, name)
    if current is None:
        return EXIT_REJECTED
    print(format_value(current))
    return EXIT_OK


def _set(session, name, text):
    from rclpy.parameter import Parameter

    current = _current_value(session, name)
    if current is None:
        return EXIT_REJECTED
    value = parse_value(text, current.type)
    parameter = Parameter(name, value=value)
    if parameter.type_.value != current.type:
        # rclpy's own message for this names neither the parameter nor the types.
        print(f"rejected: {name} is {_type_words(current.type)} parameter, "
              f"{text!r} is {_type_words(parameter.type_.value)}", file=sys.stderr)
        return EXIT_REJECTED
    result = session.call(session.client.set_parameters([parameter])).results[0]
    if not result.successful:
        print(f"rejected by {session.remote}: {result.reason}", file=sys.stderr)
        return EXIT_REJECTED
    print(f"{name} = {value!r}")
    return EXIT_OK


def _list(session):
    names = sorted(session.call(session.client.list_parameters()).result.names)
    if not names:
        return EXIT_OK
    values = session.call(session.client.get_parameters(names)).values
    descriptors = session.call(session.client.describe_parameters(names)).descriptors
    width = max(len(name) for name in names)
    for index, name in enumerate(names):
        value = format_value(values[index]) if index < len(values) else "?"
        line = f"{name:<{width}}  {value}"
        if index < len(descriptors):
            descriptor = descriptors[index]
            notes = [descriptor.description] if descriptor.description else []
            if descriptor.additional_constraints:
                notes.append(descriptor.additional_constraints)
            if descriptor.read_only:
                notes.append("read-only")
            if notes:
                line += "  # " + "; ".join(notes)
        print(line)
    return EXIT_OK


def run(args):
    if args.action in ("get", "set") and not args.name:
        print(f"riskbound param {args.action}: NAME is required", file=sys.stderr)
        return EXIT_REJECTED
    if args.action == "set" and args.value is None:
        print("riskbound param set: VALUE is required", file=sys.stderr)
        return EXIT_REJECTED
    if args.timeout_s <= 0.0:
        print(f"--timeout-s={args.timeout_s} is out of range: must be > 0", file=sys.stderr)
        return EXIT_REJECTED
    session = None
    try:
        session = _Session(args.node, args.timeout_s)
        session.wait()
        if args.action == "get":
            return _get(session, args.name)
        if args.action == "set":
            return _set(session, args.name, args.value)
        return _list(session)
    except ServiceUnavailable as error:
        print(str(error), file=sys.stderr)
        return EXIT_UNAVAILABLE
    finally:
        if session is not None:
            session.close()
