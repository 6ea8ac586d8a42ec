"""`riskbound tune NODE [NAME | NAME=VALUE ...]`: read and change a running node's settings.

  riskbound tune NODE                      table of every setting: value, range, read-only, description
  riskbound tune NODE NAME [NAME ...]      current values (one name: the bare value, for scripts)
  riskbound tune NODE NAME=VALUE [...]     apply in the order given; stop at the first rejection

A VALUE is read against the setting's current type, never guessed from its look: a double takes
any number ("1" is 1.0, "1e-3" is 0.001), an integer an integer, a bool `true` or `false`, a string
the text exactly as typed (so a frame called "123" stays a string), and an array a comma-separated
list of its element type ("" is the empty array).

It talks to the node's rcl_interfaces parameter services (`<node>/get_parameters`,
`set_parameters`, `list_parameters`, `describe_parameters`).

Exit codes: 0 done, 1 rejected, unknown setting or bad usage (the reason is printed),
2 the node's parameter services did not answer within --timeout-s.
"""

import os
import sys

EXIT_OK, EXIT_REJECTED, EXIT_UNAVAILABLE = 0, 1, 2

EPILOG = """forms:
  riskbound tune planner                              the table of settings
  riskbound tune planner risk_level                   one value
  riskbound tune planner risk_level=0.02 step_s=0.1   apply in order, stop at the first rejection

exit codes: 0 done; 1 rejected, unknown setting or bad usage (reason on stderr);
2 the node's parameter services did not answer within --timeout-s"""


class ServiceUnavailable(Exception):
    """The node's parameter services did not answer in time."""


class Rejected(Exception):
    """A value that does not fit the setting's type; the message says why."""


def add_arguments(parser):
    import argparse

    parser.epilog = EPILOG
    parser.formatter_class = argparse.RawDescriptionHelpFormatter
    parser.add_argument("node", help="node name, relative ('planner') or absolute ('/robot1/planner')")
    parser.add_argument("items", nargs="*", metavar="NAME[=VALUE]",
                        help="none: the table of settings; NAME: its value; NAME=VALUE: apply, in order")
    parser.add_argument("--timeout-s", type=float, default=5.0,
                        help="how long to wait for the node's parameter services [s] (default 5)")


def _bool_from_text(name, text):
    words = {"true": True, "false": False}
    if text.strip().lower() not in words:
        raise Rejected(f"{name} is a bool setting, {text!r} is not true or false")
    return words[text.strip().lower()]


def _int_from_text(name, text):
    try:
        return int(text.strip())
    except ValueError:
        raise Rejected(f"{name} is an integer setting, {text!r} is not an integer") from None


def _float_from_text(name, text):
    try:
        return float(text.strip())
    except ValueError:
        raise Rejected(f"{name} is a double setting, {text!r} is not a number") from None


def value_from_text(name, text, current_type):
    """Python value of `text` for the setting `name` whose current type is `current_type`
    (an rcl_interfaces/ParameterType value). Raises Rejected when the text does not fit the type."""
    from rcl_interfaces.msg import ParameterType as T

    scalar = {T.PARAMETER_BOOL: _bool_from_text, T.PARAMETER_INTEGER: _int_from_text,
              T.PARAMETER_DOUBLE: _float_from_text, T.PARAMETER_STRING: lambda _name, item: item}
    if current_type in scalar:
        return scalar[current_type](name, text)
    element = {T.PARAMETER_BOOL_ARRAY: T.PARAMETER_BOOL, T.PARAMETER_INTEGER_ARRAY: T.PARAMETER_INTEGER,
               T.PARAMETER_DOUBLE_ARRAY: T.PARAMETER_DOUBLE, T.PARAMETER_STRING_ARRAY: T.PARAMETER_STRING}
    if current_type in element:
        if not text.strip():
            return []
        return [scalar[element[current_type]](name, item) for item in text.split(",")]
    raise Rejected(f"{name}: settings of this type cannot be changed from the command line")


def text_of_value(parameter_value):
    """Text of an rcl_interfaces/ParameterValue in the form `value_from_text` reads back."""
    from rclpy.parameter import parameter_value_to_python

    def one(value):
        if isinstance(value, bool):
            return "true" if value else "false"
        return str(value)

    value = parameter_value_to_python(parameter_value)
    if isinstance(value, (list, tuple)) or hasattr(value, "tolist"):
        return ",".join(one(item) for item in list(value))
    return one(value)


def range_text(descriptor):
    """The allowed range a descriptor states, as `[from, to]` (with the step when there is one),
    followed by any free-text constraint; empty when the node states none."""
    parts = []
    for bounds in list(descriptor.floating_point_range) + list(descriptor.integer_range):
        text = f"[{bounds.from_value:g}, {bounds.to_value:g}]"
        if bounds.step:
            text += f" step {bounds.step:g}"
        parts.append(text)
    if descriptor.additional_constraints:
        parts.append(descriptor.additional_constraints)
    return "; ".join(parts)


class _Session:
    """A short-lived client node bound to one remote node's parameter services."""

    def __init__(self, node_name, timeout_s):
        import rclpy
        from rclpy.parameter_client import AsyncParameterClient

        self._rclpy = rclpy
        self._timeout_s = timeout_s
        self.remote = node_name if node_name.startswith("/") else "/" + node_name
        rclpy.init(args=[])
        self.node = rclpy.create_node(f"riskbound_tune_{os.getpid()}", start_parameter_services=False)
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

    def current(self, name):
        """The setting's ParameterValue; Rejected when the node has no such setting."""
        from rcl_interfaces.msg import ParameterType

        values = self.call(self.client.get_parameters([name])).values
        if not values or values[0].type == ParameterType.PARAMETER_NOT_SET:
            raise Rejected(f"{self.remote} has no setting {name!r}")
        return values[0]

    def close(self):
        self.node.destroy_node()
        self._rclpy.try_shutdown()


def _show(session, names):
    values = [session.current(name) for name in names]
    if len(names) == 1:
        print(text_of_value(values[0]))
        return EXIT_OK
    width = max(len(name) for name in names)
    for name, value in zip(names, values):
        print(f"{name:<{width}}  {text_of_value(value)}")
    return EXIT_OK


def _apply(session, assignments):
    from rclpy.parameter import Parameter

    for index, (name, text) in enumerate(assignments):
        try:
            value = value_from_text(name, text, session.current(name).type)
            result = session.call(session.client.set_parameters([Parameter(name, value=value)])).results[0]
            if not result.successful:
                raise Rejected(f"{name}: rejected by {session.remote}: {result.reason}")
        except Rejected as error:
            print(f"rejected: {error}", file=sys.stderr)
            skipped = [item_name for item_name, _ in assignments[index + 1:]]
            if skipped:
                print(f"not applied: {', '.join(skipped)}", file=sys.stderr)
            return EXIT_REJECTED
        print(f"{name} = {text_of_value(Parameter(name, value=value).to_parameter_msg().value)}")
    return EXIT_OK


def _table(session):
    names = sorted(session.call(session.client.list_parameters()).result.names)
    if not names:
        return EXIT_OK
    values = session.call(session.client.get_parameters(names)).values
    descriptors = session.call(session.client.describe_parameters(names)).descriptors
    rows = [("setting", "value", "range", "read-only", "description")]
    for name, value, descriptor in zip(names, values, descriptors):
        rows.append((name, text_of_value(value), range_text(descriptor),
                     "yes" if descriptor.read_only else "", descriptor.description))
    widths = [max(len(row[column]) for row in rows) for column in range(4)]
    for row in rows:
        print("  ".join(cell.ljust(width) for cell, width in zip(row[:4], widths)) + "  " + row[4])
    return EXIT_OK


def _split_items(items):
    """(names to show, (name, text) pairs to apply); ValueError when reads and writes are mixed
    or a name is empty."""
    assignments = [tuple(item.split("=", 1)) for item in items if "=" in item]
    names = [item for item in items if "=" not in item]
    if assignments and names:
        raise ValueError(f"give either names to read or NAME=VALUE pairs to apply, not both: "
                         f"{' '.join(items)}")
    if any(not name for name in names) or any(not name for name, _ in assignments):
        raise ValueError(f"an empty setting name in {' '.join(items)!r}")
    return names, assignments


def run(args):
    try:
        names, assignments = _split_items(args.items)
    except ValueError as error:
        print(f"riskbound tune: {error}", file=sys.stderr)
        return EXIT_REJECTED
    if args.timeout_s <= 0.0:
        print(f"--timeout-s={args.timeout_s} is out of range: must be > 0", file=sys.stderr)
        return EXIT_REJECTED
    session = None
    try:
        session = _Session(args.node, args.timeout_s)
        session.wait()
        if assignments:
            return _apply(session, assignments)
        if names:
            return _show(session, names)
        return _table(session)
    except Rejected as error:
        print(str(error), file=sys.stderr)
        return EXIT_REJECTED
    except ServiceUnavailable as error:
        print(str(error), file=sys.stderr)
        return EXIT_UNAVAILABLE
    finally:
        if session is not None:
            session.close()
