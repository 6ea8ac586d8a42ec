"""The shared `main()` of the nodes that simply spin: init → spin → shutdown.

Ctrl-C and SIGTERM (rclpy turns it into ExternalShutdownException) end the node cleanly with exit
code 0, also when a message caught mid-shutdown makes rclpy raise; an invalid start-up configuration is logged as fatal with its reason and exits 1.
"""

import rclpy
from rclpy.exceptions import ParameterException
from rclpy.executors import ExternalShutdownException


def spin_node(node_class, node_name, args=None):
    """Create `node_class()` and spin it until shutdown. Returns the process exit code."""
    rclpy.init(args=args)
    node = None
    code = 0
    try:
        node = node_class()
        rclpy.spin(node)
    except (KeyboardInterrupt, ExternalShutdownException):
        pass
    except (ValueError, ParameterException) as error:
        rclpy.logging.get_logger(node_name).fatal(f"invalid configuration: {error}")
        code = 1
    except RuntimeError:
        # rclpy may fail to take a message that arrives while Ctrl-C/SIGTERM shuts the context
        # down; that is the shutdown itself, not a failure of the node.
        if rclpy.ok():
            raise
    finally:
        if node is not None:
            node.destroy_node()
        rclpy.try_shutdown()
    return code
