"""The sweep's results: one SQLite row per closed loop, written as soon as the run finishes.

Each row holds the cell's parameters, the code version that ran it and the outcomes (the fields
of riskbound.bench.crowd_loop.CellOutcome). `static_contact_frames` counts frames with the robot's
disc on a wall or fixed obstacle of the scenario (riskbound.crowd.static_map). A cell that raised
is kept in `failures` (not in `runs`), so a rerun tries it again.
"""

import csv
import sqlite3
from dataclasses import asdict, fields
from datetime import datetime, timezone

from riskbound.bench.crowd_loop import CellOutcome
from riskbound.sweep.grid import Cell

_SQL_TYPES = {bool: "INTEGER", int: "INTEGER", float: "REAL", str: "TEXT"}
CELL_COLUMNS = tuple((f.name, _SQL_TYPES[f.type]) for f in fields(Cell))
OUTCOME_COLUMNS = tuple((f.name, _SQL_TYPES[f.type]) for f in fields(CellOutcome))
RUN_COLUMNS = (("cell_key", "TEXT PRIMARY KEY"),) + CELL_COLUMNS + (
    ("effective_robot_model", "TEXT"), ("code_version", "TEXT"), ("worker", "TEXT"),
    ("finished_utc", "TEXT")) + OUTCOME_COLUMNS
# Columns that depend on the machine and the moment, not on the cell: left out when two runs of the
# same cells are compared.
TIMING_COLUMNS = ("worker", "finished_utc", "cell_s", "solve_ms_median", "solve_ms_p95", "solve_ms_max")


class ResultStore:
    """SQLite file of a sweep. Use as a context manager or call close()."""

    def __init__(self, path):
        try:
            self.connection = sqlite3.connect(str(path))
        except sqlite3.Error as error:
            raise ValueError(f"results database {path}: cannot open: {error}") from None
        self.path = path
        columns = ", ".join(f"{name} {kind}" for name, kind in RUN_COLUMNS)
        with self.connection:
            self.connection.execute(f"CREATE TABLE IF NOT EXISTS runs ({columns})")
            self.connection.execute("CREATE TABLE IF NOT EXISTS failures (cell_key TEXT, error TEXT, "
                                    "code_version TEXT, finished_utc TEXT)")

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    def close(self):
        self.connection.close()

    def done_keys(self):
        return {row[0] for row in self.connection.execute("SELECT cell_key FROM runs")}

    def add_run(self, cell, outcome, effective_robot_model, code_version, worker):
        """Store one finished run (and commit at once: a killed sweep keeps it)."""
        values = dict(cell_key=cell.key, **asdict(cell), effective_robot_model=effective_robot_model,
                      code_version=code_version, worker=worker, finished_utc=_now(), **asdict(outcome))
        names = [name for name, _ in RUN_COLUMNS]
        with self.connection:
            self.connection.execute(f"INSERT OR IGNORE INTO runs ({', '.join(names)}) VALUES "
                                    f"({', '.join('?' for _ in names)})", [values[name] for name in names])

    def add_failure(self, cell, error, code_version):
        with self.connection:
            self.connection.execute("INSERT INTO failures VALUES (?, ?, ?, ?)",
                                    (cell.key, error, code_version, _now()))

    def rows(self):
        """Every run as a dict, ordered by cell parameters."""
        cursor = self.connection.execute("SELECT * FROM runs ORDER BY scenario, params_file, robot_model, "
                                         "risk_allocation, reaction_strength_m2_s2, risk_level, seed, cell_key")
        names = [description[0] for description in cursor.description]
        return [dict(zip(names, row)) for row in cursor]

    def export_csv(self, path):
        """Write every run to a CSV file (header row, one line per run). Returns the row count."""
        rows = self.rows()
        with open(path, "w", newline="", encoding="utf-8") as handle:
            writer = csv.DictWriter(handle, fieldnames=[name for name, _ in RUN_COLUMNS])
            writer.writeheader()
            writer.writerows(rows)
        return len(rows)


def _now():
    return datetime.now(timezone.utc).isoformat(timespec="seconds")
