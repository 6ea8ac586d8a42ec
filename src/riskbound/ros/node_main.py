"""The shared `main()` of the nodes: init → (bring up a managed node) → spin → shutdown.

Ctrl-C and SIGTERM (rclpy turns it into ExternalShutdownException) end the node cleanly with exit
code 0, also when a message caught mid-shutdown makes rclpy raise; so does the shutdown transition
of a managed node (riskbound.ros.managed_node). An invalid start-up configuration of a plain node,
or a start value outside a parameter's declared range, is logged as fatal with its reason and
exits 1; a managed node refuses invalid settings at configure and stays up, unconfigured.
"""

import time

import rclpy
from rclpy.exceptions import ParameterException
from rclpy.executors import ExternalShutdownException

from riskbound.ros.managed_node import ManagedNode

# How long a finalized managed node keeps serving before its process ends [s].
SHUTDOWN_GRACE_S = 0.5


def spin_node(node_class, node_name, args=None):
    """Create `node_class()` and spin it until shutdown. Returns the process exit code."""
    rclpy.init(args=args)
    node = None
    code = 0
    try:
        node = node_class()
        if isinstance(node, ManagedNode):
            node.bring_up()
            rclpy.spin_until_future_complete(node, node.finished)
            # The answer to the shutdown request must leave the process before it ends.
            deadline = time.monotonic() + SHUTDOWN_GRACE_S
            while time.monotonic() < deadline:
                rclpy.spin_once(node, timeout_sec=0.05)
        else:
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
