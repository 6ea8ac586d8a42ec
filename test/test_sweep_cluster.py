"""`riskbound sweep` on real Dask clusters: a scheduler and two worker processes started here (on
127.0.0.1, no dashboard) give the same rows as a serial run of the same cells; a worker killed in
the middle of a sweep costs no cell and duplicates none; an interrupted sweep run again does only
the cells it had not finished. Every process a test starts, the test stops.

The cells are short crossings (a few planning cycles). The solver's wall-time cap is raised
(control_rate_hz 1 gives a 0.9 s cap) so that a busy machine cannot change a run's outcome: the
rows of two runs are compared column for column, timing columns aside."""

import json
import os
import signal
import sqlite3
import subprocess
import sys
import threading
import time
from pathlib import Path

import psutil
import pytest

from riskbound.sweep.grid import build_grid
from riskbound.sweep.runner import run_sweep
from riskbound.sweep.store import TIMING_COLUMNS, ResultStore

REPO = Path(__file__).resolve().parents[1]
DASK = Path(sys.executable).with_name("dask")
SCENARIO = str(REPO / "config" / "crowd_courtyard_40.yaml")
PARAMS = str(REPO / "config" / "drone.yaml")
STEADY = {"control_rate_hz": 1.0}  # solver wall-time cap 0.9 s: outcomes independent of machine load


def tiny_cells(seeds, risk_levels=(0.05, 0.2), reactions=(0.0, 2.1), max_cycles=6):
    return build_grid(list(risk_levels), ["per_constraint"], [SCENARIO], list(seeds), [PARAMS], ["from_file"],
                      list(reactions), start_s=1.0, duration_s=5.0, max_cycles=max_cycles, overrides=STEADY)


def _stop(processes):
    for process in processes:
        if process.poll() is None:
            process.terminate()
    for process in processes:
        try:
            process.wait(timeout=10)
        except subprocess.TimeoutExpired:
            process.kill()
            process.wait(timeout=10)


def _listening_addresses(pids):
    addresses = set()
    for pid in pids:
        for connection in psutil.Process(pid).net_connections(kind="inet"):
            if connection.status == psutil.CONN_LISTEN:
                addresses.add(connection.laddr.ip)
    return addresses


@pytest.fixture
def cluster(tmp_path):
    """(scheduler address, [worker processes]): a scheduler and two single-thread worker processes
    without nannies (a killed worker stays dead), all on 127.0.0.1."""
    scheduler_file = tmp_path / "scheduler.json"
    env = dict(os.environ, OPENBLAS_NUM_THREADS="1")
    processes = [subprocess.Popen([str(DASK), "scheduler", "--host", "127.0.0.1", "--port", "0", "--no-dashboard",
                                   "--dashboard-address", "127.0.0.1:0", "--scheduler-file", str(scheduler_file)],
                                  env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)]
    try:
        deadline = time.monotonic() + 30
        while not scheduler_file.exists() or not scheduler_file.read_text().strip():
            assert time.monotonic() < deadline, "the scheduler did not start"
            time.sleep(0.1)
        time.sleep(0.2)
        address = json.loads(scheduler_file.read_text())["address"]
        workers = [subprocess.Popen([str(DASK), "worker", address, "--host", "127.0.0.1", "--nthreads", "1",
                                     "--no-nanny", "--no-dashboard", "--dashboard-address", "127.0.0.1:0",
                                     "--name", f"worker-{i}"],
                                    env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
                   for i in range(2)]
        processes += workers
        from distributed import Client

        with Client(address, timeout="30s") as client:
            client.wait_for_workers(2, timeout=60)
        # Nothing may listen beyond this machine (safety rule for tests on shared machines).
        assert _listening_addresses([p.pid for p in processes]) == {"127.0.0.1"}
        yield address, workers
    finally:
        _stop(processes)


def _comparable(rows):
    return [{name: value for name, value in row.items() if name not in TIMING_COLUMNS} for row in rows]


def test_rows_from_two_worker_processes_equal_a_serial_run(cluster, tmp_path):
    address, _ = cluster
    cells = tiny_cells(seeds=[1, 2, 3])
    distributed_db, serial_db = tmp_path / "distributed.sqlite", tmp_path / "serial.sqlite"
    summary = run_sweep(cells, distributed_db, scheduler=address)
    assert (summary.done, summary.failed, summary.skipped) == (len(cells), 0, 0)
    assert run_sweep(cells, serial_db, serial=True).done == len(cells)
    with ResultStore(distributed_db) as store:
        distributed_rows = store.rows()
    with ResultStore(serial_db) as store:
        serial_rows = store.rows()
    assert len(distributed_rows) == len(cells) == 12
    assert len({row["worker"] for row in distributed_rows}) == 2  # both worker processes took cells
    assert _comparable(distributed_rows) == _comparable(serial_rows)


def test_a_worker_killed_mid_sweep_costs_no_cell(cluster, tmp_path):
    address, workers = cluster
    cells = tiny_cells(seeds=[1, 2, 3, 4], reactions=(0.0,), max_cycles=25)
    db = tmp_path / "results.sqlite"
    outcome = {}
    sweep = threading.Thread(target=lambda: outcome.update(summary=run_sweep(cells, db, scheduler=address)))
    sweep.start()
    deadline = time.monotonic() + 60
    while _row_count(db) < 1:
        assert time.monotonic() < deadline and sweep.is_alive(), "no cell finished"
        time.sleep(0.05)
    assert _row_count(db) < len(cells)  # the kill falls in the middle of the sweep
    workers[0].send_signal(signal.SIGKILL)
    workers[0].wait(timeout=10)
    sweep.join(timeout=120)
    assert not sweep.is_alive()
    assert (outcome["summary"].done, outcome["summary"].failed) == (len(cells), 0)
    with sqlite3.connect(db) as connection:
        counts = dict(connection.execute("SELECT cell_key, COUNT(*) FROM runs GROUP BY cell_key"))
    assert counts == {cell.key: 1 for cell in cells}


def _row_count(db):
    if not Path(db).exists():
        return 0
    try:
        with sqlite3.connect(db) as connection:
            return connection.execute("SELECT COUNT(*) FROM runs").fetchone()[0]
    except sqlite3.OperationalError:  # the table is being created
        return 0


def test_an_interrupted_sweep_run_again_does_only_the_rest(tmp_path):
    db = tmp_path / "results.sqlite"
    options = ["--risk-levels", "0.05", "0.2", "--seeds", "1", "2", "3", "--reaction-strengths", "0",
               "--scenarios", SCENARIO, "--params-files", PARAMS, "--start-s", "1", "--duration-s", "5",
               "--max-cycles", "25", "--set", "control_rate_hz=1.0"]
    command = [sys.executable, "-m", "riskbound.cli", "sweep", "run", "--db", str(db), *options]
    process = subprocess.Popen(command + ["--workers", "1"], cwd=tmp_path, stdout=subprocess.PIPE,
                               stderr=subprocess.PIPE, start_new_session=True)
    try:
        deadline = time.monotonic() + 60
        while _row_count(db) < 2:
            assert time.monotonic() < deadline and process.poll() is None, process.stderr.read().decode()[-2000:]
            time.sleep(0.05)
        children = psutil.Process(process.pid).children(recursive=True)
        process.send_signal(signal.SIGINT)
        assert process.wait(timeout=60) == 130
        _, still_running = psutil.wait_procs(children, timeout=20)
        assert still_running == []  # the embedded cluster went down with the command
    finally:
        if process.poll() is None:
            os.killpg(process.pid, signal.SIGKILL)
            process.wait()
    with ResultStore(db) as store:
        before = {row["cell_key"]: row for row in store.rows()}
    assert 2 <= len(before) < 6

    cells = tiny_cells(seeds=[1, 2, 3], reactions=(0.0,), max_cycles=25)
    summary = run_sweep(cells, db, serial=True)
    assert (summary.skipped, summary.done, summary.failed) == (len(before), 6 - len(before), 0)
    with ResultStore(db) as store:
        after = {row["cell_key"]: row for row in store.rows()}
    assert set(after) == {cell.key for cell in cells}
    for key, row in before.items():
        assert after[key] == row  # not run again: same worker, same finish time, same figures
