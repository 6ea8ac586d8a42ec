"""Start the node processes of a launch description, watch them, and stop every one of them.

Rules (what a robotics engineer expects from a launcher, stricter where a half-running stack is
unsafe):

- Every node runs in its own session (process group), so Ctrl-C at the terminal reaches only the
  runner, which then stops the nodes in order; each child also gets SIGTERM from the kernel if
  the runner dies without cleaning up (Linux parent-death signal), so no node outlives it.
- The launch ends when the runner gets SIGINT/SIGTERM/SIGHUP, when a node marked
  on_exit="shutdown" ends, or when any node exits with a non-zero code or is killed by a signal
  (unlike the standard launcher, which lets the others run on: a stack with a dead node is not
  one to leave driving a robot). A node ending with code 0 otherwise just ends.
- Stopping: SIGINT to every remaining process group, then SIGTERM to those still running after
  sigint_timeout_s, then SIGKILL after sigterm_timeout_s. A second Ctrl-C skips to the next step.
- Exit code: 0 for a requested or on_exit="shutdown" end where every node stopped cleanly; 1 when
  a node failed or had to be killed; the message names the node and shows its last output lines.

Node output goes to <log_dir>/<name>.log, and also to this process's stdout for output="screen"
or "both", each line after the node's name and a bar (`planner  │ …`); the runner's own lines
carry RUNNER_LABEL. Names are padded to one width, so the bars line up.
"""

import ctypes
import os
import signal
import subprocess
import sys
import threading
import time
from collections import deque
from dataclasses import dataclass, field
from pathlib import Path

POLL_S = 0.05
RUNNER_LABEL = "runner"
BAR = "│"
TAIL_LINES = 25
_PR_SET_PDEATHSIG = 1


def _parent_death_signal():
    """preexec_fn for Linux: the child gets SIGTERM when the runner's thread that started it ends.

    Resolved before any fork; the call in the child is a single libc call (no allocation, no
    locks), which is safe between fork and exec.
    """
    try:
        prctl = ctypes.CDLL(None, use_errno=True).prctl
    except (OSError, AttributeError):
        return None
    prctl.argtypes = [ctypes.c_int, ctypes.c_ulong]

    def set_signal():
        prctl(_PR_SET_PDEATHSIG, signal.SIGTERM)

    return set_signal


@dataclass
class ProcessSpec:
    label: str
    command: list
    environment: dict
    output: str               # screen | log | both
    on_exit_shutdown: bool


@dataclass
class _Child:
    spec: ProcessSpec
    process: subprocess.Popen
    log_path: Path
    started_s: float
    tail: deque = field(default_factory=lambda: deque(maxlen=TAIL_LINES))
    reader: threading.Thread = None
    reported: bool = False


class Supervisor:
    """Runs ProcessSpecs until the launch ends; `run()` returns the exit code."""

    def __init__(self, specs, log_dir, sigint_timeout_s=5.0, sigterm_timeout_s=5.0, out=None):
        self.specs = list(specs)
        self.log_dir = Path(log_dir)
        self.sigint_timeout_s = sigint_timeout_s
        self.sigterm_timeout_s = sigterm_timeout_s
        self.out = out or sys.stdout
        self._children = []
        # Re-entrant: the signal handler may print while the main thread holds it.
        self._write_lock = threading.RLock()
        self._stop_requests = 0
        self._failed = False
        self._label_width = max([len(RUNNER_LABEL)] + [len(spec.label) for spec in self.specs])

    # --- output ----------------------------------------------------------------------------------

    def line_prefix(self, label):
        return f"{label:<{self._label_width}} {BAR} "

    def say(self, text):
        with self._write_lock:
            self.out.write(self.line_prefix(RUNNER_LABEL) + text + "\n")
            self.out.flush()

    def _pump(self, child):
        """Reader thread: the child's combined stdout/stderr, line by line, to its log and the screen."""
        echo = child.spec.output in ("screen", "both")
        with open(child.log_path, "a", encoding="utf-8", errors="replace") as log:
            for raw in child.process.stdout:
                line = raw.decode("utf-8", errors="replace").rstrip("\n")
                child.tail.append(line)
                log.write(line + "\n")
                log.flush()
                if echo:
                    with self._write_lock:
                        self.out.write(self.line_prefix(child.spec.label) + line + "\n")
                        self.out.flush()

    # --- signals ---------------------------------------------------------------------------------

    def _on_signal(self, signum, _frame):
        self._stop_requests += 1
        if self._stop_requests == 1:
            self.say(f"{signal.Signals(signum).name} received: stopping all nodes")

    # --- the run ---------------------------------------------------------------------------------

    def run(self):
        self.log_dir.mkdir(parents=True, exist_ok=True)
        previous = {s: signal.signal(s, self._on_signal) for s in (signal.SIGINT, signal.SIGTERM, signal.SIGHUP)}
        try:
            self._start_all()
            if not self._failed:
                self._watch()
            self._stop_all()
        finally:
            for signum, handler in previous.items():
                signal.signal(signum, handler)
            for child in self._children:
                if child.reader is not None:
                    child.reader.join(timeout=2.0)
        return 1 if self._failed else 0

    def _start_all(self):
        """Start every process before any reader thread exists (fork with threads is unsafe)."""
        preexec = _parent_death_signal()
        for spec in self.specs:
            if self._stop_requests:
                break
            log_path = self.log_dir / f"{spec.label}.log"
            try:
                process = subprocess.Popen(spec.command, stdin=subprocess.DEVNULL, stdout=subprocess.PIPE,
                                           stderr=subprocess.STDOUT, env={**os.environ, **spec.environment},
                                           start_new_session=True, preexec_fn=preexec)
            except OSError as error:
                self.say(f"node '{spec.label}' failed to start: {' '.join(spec.command)}: {error}")
                self._failed = True
                break
            self._children.append(_Child(spec, process, log_path, time.monotonic()))
            self.say(f"started '{spec.label}' (pid {process.pid}): {' '.join(spec.command)}")
        for child in self._children:
            child.reader = threading.Thread(target=self._pump, args=(child,), name=f"log-{child.spec.label}",
                                            daemon=True)
            child.reader.start()

    def _watch(self):
        """Until a stop request, an on_exit="shutdown" node ending, a failure, or no node left."""
        while not self._stop_requests:
            running = 0
            for child in self._children:
                code = child.process.poll()
                if code is None:
                    running += 1
                    continue
                if child.reported:
                    continue
                child.reported = True
                if code != 0:
                    self._report_failure(child, code)
                    return
                self.say(f"'{child.spec.label}' finished (exit code 0)")
                if child.spec.on_exit_shutdown:
                    self.say(f"'{child.spec.label}' has on_exit=\"shutdown\": stopping the launch")
                    return
            if running == 0:
                self.say("every node has finished")
                return
            time.sleep(POLL_S)

    def _report_failure(self, child, code):
        self._failed = True
        uptime_s = time.monotonic() - child.started_s
        how = f"was killed by {signal.Signals(-code).name}" if code < 0 else f"exited with code {code}"
        when = "while starting" if uptime_s < 5.0 else f"after {uptime_s:.1f} s"
        self.say(f"ERROR: node '{child.spec.label}' {how} {when}; stopping the launch")
        if child.reader is not None:
            child.reader.join(timeout=1.0)
        if child.spec.output == "log" and child.tail:
            self.say(f"last output of '{child.spec.label}' (full log: {child.log_path}):")
            with self._write_lock:
                for line in child.tail:
                    self.out.write(f"    {line}\n")
                self.out.flush()

    def _stop_all(self):
        """SIGINT, then SIGTERM, then SIGKILL to the process groups still running."""
        steps = ((signal.SIGINT, self.sigint_timeout_s), (signal.SIGTERM, self.sigterm_timeout_s),
                 (signal.SIGKILL, self.sigterm_timeout_s))
        for index, (signum, timeout_s) in enumerate(steps):
            alive = [c for c in self._children if c.process.poll() is None]
            if not alive:
                break
            if signum != signal.SIGINT:
                self._failed = True
                self.say(f"{', '.join(c.spec.label for c in alive)} still running: sending {signum.name}")
            for child in alive:
                try:
                    os.killpg(child.process.pid, signum)
                except ProcessLookupError:
                    pass
            requests = self._stop_requests
            deadline = time.monotonic() + timeout_s
            while time.monotonic() < deadline and any(c.process.poll() is None for c in alive):
                if index < 2 and self._stop_requests > requests:
                    break  # another Ctrl-C: go on to the next signal now
                time.sleep(POLL_S)
        self._reap_groups()
        for child in self._children:
            code = child.process.poll()
            if code is None or child.reported:
                continue
            child.reported = True
            if code not in (0, -signal.SIGINT, -signal.SIGTERM, -signal.SIGKILL):
                self._failed = True
                self.say(f"ERROR: node '{child.spec.label}' exited with code {code} while stopping "
                         f"(log: {child.log_path})")

    def _reap_groups(self):
        """Kill whatever the nodes themselves started and left behind in their process groups."""
        for child in self._children:
            try:
                os.killpg(child.process.pid, signal.SIGKILL)
            except (ProcessLookupError, PermissionError):
                continue
            self._failed = True
            self.say(f"processes left in the group of '{child.spec.label}' were killed")
