"""Running a sweep's cells: on Dask distributed (an embedded local cluster, or an existing one by
address) or in this process, one after another.

The client hands every cell still missing from the results store to the cluster and writes each
row the moment its run comes back, so an interrupted or killed sweep keeps every finished run and
the same command run again does only the rest. When a worker dies, the scheduler gives its cells
to the others (Dask's own recovery); a cell is written once, whoever finished it.

The embedded cluster listens on 127.0.0.1 only and has no dashboard. Each worker is one process
with one thread (the planner's solver is single-threaded; two threads in one process would share
one interpreter lock).
"""

import logging
import os
import socket
import subprocess
import sys
import time
from dataclasses import dataclass
from pathlib import Path

from riskbound.sweep.store import ResultStore

LOG = logging.getLogger(__name__)
# Redraw the progress bar at most this often [s].
_PROGRESS_PERIOD_S = 0.5
_BAR_WIDTH = 30


@dataclass
class SweepSummary:
    cells: int        # cells in the grid
    skipped: int      # already in the results store when the sweep started
    done: int         # finished and written by this sweep
    failed: int       # raised an error (kept in the store's failures table)
    wall_s: float


def code_version():
    """`git describe --always --dirty --tags` of the source tree when it is a git checkout, else the
    package version."""
    import riskbound

    source = Path(riskbound.__file__).resolve().parent
    try:
        result = subprocess.run(["git", "describe", "--always", "--dirty", "--tags"], cwd=source,
                                capture_output=True, text=True, timeout=10, check=False)
    except (OSError, subprocess.SubprocessError):
        result = None
    if result is not None and result.returncode == 0 and result.stdout.strip():
        return "git " + result.stdout.strip()
    return "riskbound " + riskbound.__version__


def execute_cell(cell):
    """Run one cell (on a worker, or here). Returns (cell, CellOutcome, planner robot model, worker)."""
    from riskbound.bench.crowd_loop import load_settings, run_cell

    max_cycles = cell.max_cycles or None
    planner, _, _ = load_settings(cell.params_file, cell.planner_overrides(), {})
    outcome = run_cell(cell.params_file, cell.scenario, cell.seed, cell.start_s, cell.duration_s,
                       cell.planner_overrides(), reaction_strength_m2_s2=cell.reaction_strength_m2_s2,
                       max_cycles=max_cycles)
    return cell, outcome, planner.robot_model, f"{socket.gethostname()}:{os.getpid()}"


class ProgressBar:
    """One line on a stream: cells done, failed and remaining (rewritten in place on a terminal,
    a new line now and then otherwise)."""

    def __init__(self, total, stream=None):
        self.total, self.done, self.failed = total, 0, 0
        self.stream = sys.stderr if stream is None else stream
        self.started = time.perf_counter()
        self.last_drawn = -float("inf")
        self.drawn = None
        self.is_terminal = hasattr(self.stream, "isatty") and self.stream.isatty()

    def update(self, done=0, failed=0, force=False):
        self.done += done
        self.failed += failed
        now = time.perf_counter()
        period = _PROGRESS_PERIOD_S if self.is_terminal else 10.0
        if not force and now - self.last_drawn < period and self.done + self.failed < self.total:
            return
        self.last_drawn = now
        self.drawn = (self.done, self.failed)
        finished = self.done + self.failed
        filled = int(round(_BAR_WIDTH * finished / self.total)) if self.total else _BAR_WIDTH
        line = (f"[{'#' * filled}{'.' * (_BAR_WIDTH - filled)}] {self.done} done, {self.failed} failed, "
                f"{self.total - finished} remaining, {now - self.started:.0f} s")
        self.stream.write(("\r" + line + "   ") if self.is_terminal else line + "\n")
        self.stream.flush()

    def close(self):
        if self.drawn != (self.done, self.failed):
            self.update(force=True)
        if self.is_terminal:
            self.stream.write("\n")
            self.stream.flush()


def _tasks_serial(items, function, on_result, on_error):
    for item in items:
        try:
            result = function(item)
        except Exception as error:  # noqa: BLE001 - as on the cluster: the item fails, the batch goes on
            on_error(item, f"{type(error).__name__}: {error}")
        else:
            on_result(item, result)


def _tasks_on_client(items, function, on_result, on_error, client, key):
    from distributed import as_completed

    futures = {client.submit(function, item, key=key(item), pure=False): item for item in items}
    try:
        for future in as_completed(futures):
            item = futures[future]
            try:
                result = future.result()
            except Exception as error:  # noqa: BLE001 - any error of a task is that item's failure, the batch goes on
                on_error(item, f"{type(error).__name__}: {error}")
            else:
                on_result(item, result)
            future.release()
    except BaseException:
        client.cancel(list(futures))  # interrupted: nothing more to compute for this client
        raise


def run_tasks(items, function, on_result, on_error, key, workers=2, scheduler=None, serial=False):
    """function(item) for every item: here one after another (serial), on an existing Dask cluster
    (scheduler address) or on an embedded local cluster of `workers` processes. on_result(item,
    result) and on_error(item, message) are called here, in this process, as each item finishes.
    key(item): a unique task name."""
    if not serial and scheduler is None and workers < 1:
        raise ValueError(f"workers={workers!r}: must be >= 1")
    if not items:
        return
    if serial:
        _tasks_serial(items, function, on_result, on_error)
        return
    from distributed import Client

    if scheduler is not None:
        with Client(scheduler, timeout="20s") as client:
            _tasks_on_client(items, function, on_result, on_error, client, key)
    else:
        with local_cluster(workers) as cluster, Client(cluster) as client:
            _tasks_on_client(items, function, on_result, on_error, client, key)


def local_cluster(workers):
    """An embedded cluster: `workers` processes of one thread each, on 127.0.0.1, no dashboard."""
    from distributed import LocalCluster

    # The scheduler always serves a few HTTP routes (health, metrics); without a dashboard they go to
    # a free port on 127.0.0.1 instead of the fixed default one.
    return LocalCluster(n_workers=workers, threads_per_worker=1, processes=True, host="127.0.0.1",
                        dashboard_address=None, silence_logs=logging.WARNING,
                        scheduler_kwargs={"dashboard": False, "dashboard_address": "127.0.0.1:0"})


def run_sweep(cells, db_path, workers=2, scheduler=None, serial=False, stream=None):
    """Run every cell of `cells` not yet in the results store at db_path. Returns a SweepSummary.

    serial: run here without Dask; scheduler: address of an existing Dask scheduler
    (tcp://host:port); otherwise an embedded local cluster of `workers` processes.
    """
    if not serial and scheduler is None and workers < 1:
        raise ValueError(f"workers={workers!r}: must be >= 1")
    started = time.perf_counter()
    version = code_version()
    with ResultStore(db_path) as store:
        present = store.done_keys()
        todo = [cell for cell in cells if cell.key not in present]
        skipped = len(cells) - len(todo)
        if skipped:
            LOG.info("%d of %d cells are already in %s: not run again", skipped, len(cells), db_path)
        bar = ProgressBar(len(todo), stream)

        def stored(cell, result):
            _, outcome, robot_model, worker = result
            store.add_run(cell, outcome, robot_model, version, worker)
            bar.update(done=1)

        def failed(cell, message):
            store.add_failure(cell, message, version)
            LOG.warning("cell %s (%s, seed %d, α %g) failed: %s", cell.key, cell.scenario, cell.seed,
                        cell.risk_level, message)
            bar.update(failed=1)

        try:
            run_tasks(todo, execute_cell, stored, failed, key=lambda cell: f"sweep-cell-{cell.key}",
                      workers=workers, scheduler=scheduler, serial=serial)
        finally:
            bar.close()
    return SweepSummary(len(cells), skipped, bar.done, bar.failed, time.perf_counter() - started)


@dataclass
class ClusterTiming:
    workers: int
    cells: int
    startup_s: float   # embedded cluster up with every worker registered
    wall_s: float      # first submission to last result
    busy_s: float      # sum of the cells' own wall times, measured on the workers

    @property
    def cells_per_s(self):
        return self.cells / self.wall_s

    @property
    def overhead_per_cell_s(self):
        """Worker time not spent in a cell, per cell: scheduling, transfer and idle ends."""
        return (self.workers * self.wall_s - self.busy_s) / self.cells


def _import_cell_modules():
    import riskbound.bench.crowd_loop  # noqa: F401
    import riskbound.crowd.simulate  # noqa: F401
    import riskbound.planning.mpc  # noqa: F401
    import riskbound.tracking.tracker  # noqa: F401


def time_cluster(cells, workers):
    """Run the cells on a fresh embedded cluster of `workers` processes, keeping nothing. Returns a
    ClusterTiming. For the throughput figures: every cell runs whatever any store holds."""
    from distributed import Client

    started = time.perf_counter()
    busy = []
    with local_cluster(workers) as cluster, Client(cluster) as client:
        client.wait_for_workers(workers)
        client.run(_import_cell_modules)  # imports are the worker's start-up, not a cell's scheduling
        ready = time.perf_counter()

        def collected(cell, result):
            busy.append(result[1].cell_s)

        def failed(cell, message):
            raise RuntimeError(f"cell {cell.key} failed while timing: {message}")

        _tasks_on_client(cells, execute_cell, collected, failed, client, lambda cell: f"timing-{cell.key}")
        finished = time.perf_counter()
    return ClusterTiming(workers, len(cells), ready - started, finished - ready, float(sum(busy)))
