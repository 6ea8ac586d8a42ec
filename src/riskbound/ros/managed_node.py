"""Managed (lifecycle) node shell shared by the planner, tracker and watchdog.

The standard managed-node states and transitions, with what each means here:

    unconfigured ──configure──► inactive ──activate──► active
         ▲                         │  ▲                   │
         └─────────cleanup─────────┘  └─────deactivate────┘
    any of the three ──shutdown──► finalized (the process then ends)

- configure reads every parameter and validates it against the node's settings table; an invalid
  value fails the transition (the node stays unconfigured) and the reason is logged and kept in
  `problem`. The node then builds its core and publishers: slow work (the planner's optimisation
  problem) happens here, never in the control loop.
- activate starts the subscriptions and timers that make the node work; deactivate stops them.
  Only an active node sends commands.
- cleanup releases what configure built; shutdown releases everything and ends the process.
- A transition that raises goes through error processing: everything is released, the node is
  left unconfigured and the error is logged (and kept in `problem`).

Parameter changes are checked against the settings table in every state. Cross-setting checks and
the effect of a change (a problem rebuild, say) need a configured node: until then the value is
only stored, and configure checks the whole set.

With the parameter `activate_at_start` (the launch files' `activate` argument) the node
configures and activates itself once at start-up, as a node without a lifecycle would run;
otherwise it waits unconfigured for an operator (`riskbound switch`) or a supervisor.
"""

import traceback

from rcl_interfaces.msg import SetParametersResult
from rclpy.lifecycle import LifecycleNode, TransitionCallbackReturn
from rclpy.task import Future

from riskbound.ros.setting_parameters import checked_changes, checked_values, parameter_descriptor
from riskbound.settings_table import SettingSpec

UNCONFIGURED, INACTIVE, ACTIVE = "unconfigured", "inactive", "active"

ACTIVATE_AT_START = SettingSpec(
    "activate_at_start", False,
    "configure and activate once at start-up (launch argument `activate`); false: stay unconfigured "
    "until an operator (riskbound switch) or a supervisor drives the transitions", read_only=True)


class ManagedNode(LifecycleNode):
    """A lifecycle node whose parameters come from a settings table.

    Subclasses implement `_configure(values)` (raise ValueError naming an invalid value),
    `_activate()`, `_deactivate()`, `_release()` (undo configure and activate; must also work
    after a partial configure), `_apply_changes(changes)` for parameter changes once configured
    (returns a rejection reason or None), and may override `_announce(state, reason)` to publish
    their state.
    """

    def __init__(self, node_name, specs, **kwargs):
        super().__init__(node_name, **kwargs)
        self._specs = {spec.name: spec for spec in specs}
        for spec in (*specs, ACTIVATE_AT_START):
            self.declare_parameter(spec.name, spec.default, parameter_descriptor(spec))
        self.lifecycle_state = UNCONFIGURED
        self.problem = ""  # why the last transition failed; empty after a successful one
        self.finished = Future()  # done after shutdown: the process may end
        self.add_on_set_parameters_callback(self._on_set_parameters)

    @property
    def is_active(self):
        return self.lifecycle_state == ACTIVE

    def bring_up(self):
        """Configure and activate when `activate_at_start` is set (once, at start-up)."""
        if not self.get_parameter(ACTIVATE_AT_START.name).value:
            self.get_logger().info("unconfigured: waiting for configure (activate_at_start is false)")
            self._announce(UNCONFIGURED, "waiting for configure")
            return
        if self.trigger_configure() == TransitionCallbackReturn.SUCCESS:
            self.trigger_activate()

    # --- hooks for the subclasses ----------------------------------------------------------------

    def _configure(self, values):
        raise NotImplementedError

    def _activate(self):
        raise NotImplementedError

    def _deactivate(self):
        raise NotImplementedError

    def _release(self):
        raise NotImplementedError

    def _apply_changes(self, changes):
        raise NotImplementedError

    def _announce(self, state, reason):
        """Called after every change of state (reason: why, when it was not asked for)."""

    # --- parameters ------------------------------------------------------------------------------

    def _on_set_parameters(self, parameters):
        """The one place parameter changes are validated (and applied once configured)."""
        ours = [p for p in parameters if p.name in self._specs]
        changes, reason = checked_changes(self._specs, ours, self.get_name())
        if reason is None and changes and self.lifecycle_state != UNCONFIGURED:
            reason = self._apply_changes(changes)
        if reason:
            return SetParametersResult(successful=False, reason=reason)
        if changes and self.lifecycle_state == UNCONFIGURED:
            self.get_logger().info("parameters stored for the next configure: " + ", ".join(
                f"{name}={value!r}" for name, value in changes.items()))
        return SetParametersResult(successful=True)

    # --- transitions -----------------------------------------------------------------------------

    def on_configure(self, state):
        return self._transition("configure", INACTIVE, lambda: self._configure(checked_values(self, self._specs.values())))

    def on_activate(self, state):
        return self._transition("activate", ACTIVE, self._activate)

    def on_deactivate(self, state):
        return self._transition("deactivate", INACTIVE, self._deactivate)

    def on_cleanup(self, state):
        return self._transition("cleanup", UNCONFIGURED, self._release)

    def on_shutdown(self, state):
        result = self._transition("shutdown", "finalized", self._release)
        self.finished.set_result(True)
        return result

    def on_error(self, state):
        self._release_after_failure()
        self.get_logger().error(f"left unconfigured after an error: {self.problem}")
        self._announce(UNCONFIGURED, self.problem)
        return TransitionCallbackReturn.SUCCESS

    def _transition(self, name, goal, step):
        """Run one transition's work; FAILURE (state unchanged) for an invalid parameter, ERROR
        (error processing: released, unconfigured) for anything else that goes wrong."""
        try:
            step()
        except ValueError as error:
            self.problem = f"{name} refused: {error}"
            self.get_logger().error(self.problem)
            if name == "configure":
                self._release_after_failure()
                self._announce(UNCONFIGURED, self.problem)
            return TransitionCallbackReturn.FAILURE
        except Exception as error:  # noqa: BLE001 - rclpy would swallow it without a word
            self.problem = f"{name} failed: {type(error).__name__}: {error}"
            self.get_logger().error(self.problem + "\n" + traceback.format_exc())
            return TransitionCallbackReturn.ERROR
        self.problem = ""
        self.lifecycle_state = goal
        self.get_logger().info(f"{name}: now {goal}")
        self._announce(goal, "")
        return TransitionCallbackReturn.SUCCESS

    def _release_after_failure(self):
        self.lifecycle_state = UNCONFIGURED
        try:
            self._release()
        except Exception:  # noqa: BLE001 - releasing what exists must not hide the first error
            self.get_logger().error("releasing after a failed transition raised:\n" + traceback.format_exc())
