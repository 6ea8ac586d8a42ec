"""`riskbound switch NODE [STEP ...]`: move a running managed node between its lifecycle states.

  riskbound switch planner                      its state and the steps it can take now
  riskbound switch planner deactivate           one step
  riskbound switch planner configure activate   steps in the order given; stop at the first refusal

A STEP is one of the managed-node transitions: configure, activate, deactivate, cleanup,
shutdown (riskbound.ros.managed_node says what each does in this package). When the node refuses
a step, the reason it logged while trying (read from /rosout) is printed with the refusal.

It talks to the node's lifecycle services (`<node>/get_state`, `get_available_transitions`,
`change_state`); nothing else is needed on the robot.

Exit codes: 0 done, 1 a step was refused or is not possible from the node's state (reason on
stderr), 2 the node's lifecycle services did not answer within --timeout-s.
"""

import os
import sys
import time

EXIT_OK, EXIT_REFUSED, EXIT_UNAVAILABLE = 0, 1, 2
STEPS = ("configure", "activate", "deactivate", "cleanup", "shutdown")
# Log lines the node writes after a refused step reach /rosout a moment after the service answer.
LOG_GRACE_S = 0.5

EPILOG = """forms:
  riskbound switch planner                      state and the steps possible now
  riskbound switch planner deactivate           take the planner out of the loop (the watchdog stops the robot)
  riskbound switch planner configure activate   bring a waiting planner up

exit codes: 0 done; 1 refused or not possible now (reason on stderr); 2 the node did not answer
within --timeout-s"""


class NodeUnavailable(Exception):
    """The node's lifecycle services did not answer in time."""


def add_arguments(parser):
    import argparse

    parser.epilog = EPILOG
    parser.formatter_class = argparse.RawDescriptionHelpFormatter
    parser.add_argument("node", help="node name, relative ('planner') or absolute ('/robot1/planner')")
    parser.add_argument("steps", nargs="*", metavar="STEP",
                        help="none: show the state; else steps to take in order: " + ", ".join(STEPS))
    parser.add_argument("--timeout-s", type=float, default=10.0,
                        help="how long to wait for each answer of the node [s] (default 10; configure "
                             "builds the planner's problem)")


class _Session:
    """A short-lived client node bound to one remote node's lifecycle services and its log lines."""

    def __init__(self, node_name, timeout_s):
        import rclpy
        from lifecycle_msgs.srv import ChangeState, GetAvailableTransitions, GetState
        from rcl_interfaces.msg import Log
        from rclpy.qos import DurabilityPolicy, QoSProfile, ReliabilityPolicy

        self._rclpy = rclpy
        self._timeout_s = timeout_s
        self.remote = node_name if node_name.startswith("/") else "/" + node_name
        self._logger_name = self.remote.lstrip("/").replace("/", ".")
        rclpy.init(args=[])
        self.node = rclpy.create_node(f"riskbound_switch_{os.getpid()}", start_parameter_services=False)
        self._get_state = self.node.create_client(GetState, f"{self.remote}/get_state")
        self._get_transitions = self.node.create_client(GetAvailableTransitions,
                                                        f"{self.remote}/get_available_transitions")
        self._change_state = self.node.create_client(ChangeState, f"{self.remote}/change_state")
        self._log_lines = []
        # /rosout keeps recent lines for late readers (transient local); only lines written after
        # a step was asked for are kept.
        self._since_ns = None
        self.node.create_subscription(Log, "/rosout", self._on_log, QoSProfile(
            depth=100, reliability=ReliabilityPolicy.RELIABLE, durability=DurabilityPolicy.TRANSIENT_LOCAL))

    def _on_log(self, msg):
        stamp_ns = msg.stamp.sec * 10**9 + msg.stamp.nanosec
        if msg.name == self._logger_name and self._since_ns is not None and stamp_ns >= self._since_ns:
            self._log_lines.append(msg)

    def wait(self):
        deadline = time.monotonic() + self._timeout_s
        for client in (self._get_state, self._get_transitions, self._change_state):
            if not client.wait_for_service(timeout_sec=max(deadline - time.monotonic(), 0.0)):
                raise NodeUnavailable(f"{self.remote}: lifecycle services not available within "
                                      f"{self._timeout_s:g} s (is it running, a managed node, with the same "
                                      "ROS_DOMAIN_ID?)")

    def _call(self, client, request):
        future = client.call_async(request)
        self._rclpy.spin_until_future_complete(self.node, future, timeout_sec=self._timeout_s)
        if not future.done() or future.result() is None:
            raise NodeUnavailable(f"{self.remote}: no answer within {self._timeout_s:g} s")
        return future.result()

    def state(self):
        return self._call(self._get_state, self._get_state.srv_type.Request()).current_state.label

    def available(self):
        """{step label: transition id} of the steps possible from the current state."""
        reply = self._call(self._get_transitions, self._get_transitions.srv_type.Request())
        return {item.transition.label: item.transition.id for item in reply.available_transitions
                if item.transition.label in STEPS}

    def take(self, transition_id):
        """Ask for one transition: (accepted, state after, error lines the node logged meanwhile)."""
        request = self._change_state.srv_type.Request()
        request.transition.id = transition_id
        self._log_lines = []
        self._since_ns = time.time_ns()
        accepted = self._call(self._change_state, request).success
        if not accepted:
            deadline = time.monotonic() + LOG_GRACE_S
            while time.monotonic() < deadline:
                self._rclpy.spin_once(self.node, timeout_sec=0.05)
        errors = [line.msg.splitlines()[0] for line in self._log_lines if line.level >= 40]  # ERROR, FATAL
        return accepted, self.state(), errors

    def close(self):
        self.node.destroy_node()
        self._rclpy.try_shutdown()


def _show(session):
    state = session.state()
    steps = [step for step in STEPS if step in session.available()]
    print(f"{session.remote}: {state}")
    print(f"possible now: {', '.join(steps) if steps else 'none'}")
    return EXIT_OK


def _take(session, steps):
    for index, step in enumerate(steps):
        available = session.available()
        if step not in available:
            state = session.state()
            print(f"{session.remote} is {state}: {step} is not possible now (possible: "
                  f"{', '.join(s for s in STEPS if s in available) or 'none'})", file=sys.stderr)
            _report_skipped(steps[index + 1:])
            return EXIT_REFUSED
        accepted, state, errors = session.take(available[step])
        if not accepted:
            print(f"{session.remote}: {step} refused, now {state}", file=sys.stderr)
            for line in errors:
                print(f"  {line}", file=sys.stderr)
            _report_skipped(steps[index + 1:])
            return EXIT_REFUSED
        print(f"{session.remote}: {step} → {state}")
    return EXIT_OK


def _report_skipped(steps):
    if steps:
        print(f"not taken: {', '.join(steps)}", file=sys.stderr)


def run(args):
    unknown = [step for step in args.steps if step not in STEPS]
    if unknown:
        print(f"riskbound switch: {unknown[0]!r} is not a step: must be one of {', '.join(STEPS)}", file=sys.stderr)
        return EXIT_REFUSED
    if args.timeout_s <= 0.0:
        print(f"--timeout-s={args.timeout_s} is out of range: must be > 0", file=sys.stderr)
        return EXIT_REFUSED
    session = None
    try:
        session = _Session(args.node, args.timeout_s)
        session.wait()
        return _take(session, args.steps) if args.steps else _show(session)
    except NodeUnavailable as error:
        print(str(error), file=sys.stderr)
        return EXIT_UNAVAILABLE
    finally:
        if session is not None:
            session.close()
