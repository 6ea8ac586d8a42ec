"""Read-only string-array parameters whose default is the empty list.

rclpy infers a parameter's type from its default, and `[]` infers a byte array, which then refuses
the string list a launch file or `-p "only_topics:=[/a, /b]"` gives. Declaring the type alone
(Parameter.Type.STRING_ARRAY) leaves the parameter unset when nothing is given; it reads as ().
"""

from rcl_interfaces.msg import ParameterDescriptor
from rclpy.parameter import Parameter


def declare_string_list(node, name, description):
    """Declare `name` as a read-only string array on `node` and return its value as a tuple."""
    node.declare_parameter(name, Parameter.Type.STRING_ARRAY,
                           ParameterDescriptor(name=name, description=description, read_only=True))
    return tuple(node.get_parameter_or(name, Parameter(name, Parameter.Type.STRING_ARRAY, [])).value)
