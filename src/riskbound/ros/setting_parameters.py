"""ROS parameters from a settings table (a tuple of riskbound.settings_table.SettingSpec).

One helper for the nodes whose settings live in a core table: descriptors with description,
range and read-only flag; declaration with validation of the start values; and the check of a
runtime change, all giving SettingSpec's reason (parameter name and allowed range) when refused.
"""

from rcl_interfaces.msg import FloatingPointRange, IntegerRange, ParameterDescriptor, ParameterType

_PARAMETER_TYPES = {bool: ParameterType.PARAMETER_BOOL, int: ParameterType.PARAMETER_INTEGER,
                    float: ParameterType.PARAMETER_DOUBLE, str: ParameterType.PARAMETER_STRING}


def parameter_descriptor(spec):
    """Descriptor of one setting: type, description, numeric range or allowed values, read-only flag."""
    descriptor = ParameterDescriptor(name=spec.name, type=_PARAMETER_TYPES[type(spec.default)],
                                     description=spec.description, read_only=spec.read_only)
    if spec.choices is not None:
        descriptor.additional_constraints = f"must be {spec.allowed()}"
    elif spec.low is not None and spec.high is not None:
        # rclpy accepts a range's end points; an open bound is refused by SettingSpec.check instead.
        if isinstance(spec.default, float):
            descriptor.floating_point_range = [FloatingPointRange(from_value=float(spec.low),
                                                                  to_value=float(spec.high), step=0.0)]
        else:
            descriptor.integer_range = [IntegerRange(from_value=int(spec.low), to_value=int(spec.high), step=1)]
        descriptor.additional_constraints = f"must be in {spec.allowed()}" + (
            " (a round bracket excludes its bound)" if spec.low_open or spec.high_open else "")
    return descriptor


def _coerced(spec, value):
    if isinstance(spec.default, float) and isinstance(value, int) and not isinstance(value, bool):
        return float(value)
    return value


def declare_settings(node, specs):
    """Declare every setting on `node`; return {name: value}. ValueError names the first invalid one."""
    for spec in specs:
        node.declare_parameter(spec.name, spec.default, parameter_descriptor(spec))
    return checked_values(node, specs)


def checked_values(node, specs):
    """{name: value} of the declared settings, in table order. ValueError names the first invalid one."""
    values = {}
    for spec in specs:
        value = _coerced(spec, node.get_parameter(spec.name).value)
        reason = spec.check(value)
        if reason:
            raise ValueError(reason)
        values[spec.name] = value
    return values


def checked_changes(specs_by_name, parameters, node_name):
    """(changes, reason) for a list of rclpy Parameters: reason is None when all are allowed."""
    changes = {}
    for parameter in parameters:
        spec = specs_by_name.get(parameter.name)
        if spec is None:
            return {}, f"{parameter.name!r} is not a parameter of {node_name}"
        value = _coerced(spec, parameter.value)
        reason = spec.check(value)
        if reason:
            return {}, reason
        changes[spec.name] = value
    return changes, None


def changed_settings(settings, specs_by_name, parameters, node_name):
    """(new settings, changes, reason) for a parameter change request on a settings dataclass:
    reason is None and new settings are `settings.with_changes(**changes)` when every value is
    allowed, else new settings are None and reason says what was refused."""
    changes, reason = checked_changes(specs_by_name, parameters, node_name)
    if reason:
        return None, changes, reason
    try:
        return settings.with_changes(**changes), changes, None
    except ValueError as error:
        return None, changes, str(error)
