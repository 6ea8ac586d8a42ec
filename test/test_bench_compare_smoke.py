"""Smoke run of `riskbound bench compare --quick`: it finishes, writes its files, and its JSON holds the
documented keys with finite, self-consistent numbers (no timing assertions: the machines are noisy)."""

import json
import math
import os
import signal
import subprocess
import sys

SUITE_KEYS = ("solve_ms_median", "solve_ms_p90", "speedup_vs_mixed_integer", "cost_gap_mean", "cost_gap_median",
              "cost_gap_p90", "success_rate", "collision_probability_mean", "collision_probability_max",
              "plans_significantly_above_alpha", "stuck")
CROWD_KEYS = ("episodes", "success_rate", "collision_rate", "collisions_while_stopped", "stuck", "solve_ms_median",
              "solve_ms_p90", "failed_solve_fraction", "collision_probability_mean", "collision_probability_max",
              "collision_probability_max_considered", "plans_above_alpha", "plans_significantly_above_alpha")
PRUNING_KEYS = ("walkers_low", "walkers_high", "solve_ms_median_low", "solve_ms_median_high", "ratio",
                "solve_ms_median_replay_low", "solve_ms_median_replay_high_far", "ratio_far")
TARGETS = ("speedup_vs_mixed_integer", "cost_gap_mean", "plans_significantly_above_alpha",
           "crowd_success_vs_linearised", "pruning_ratio", "pruning_ratio_far_walkers")


def _finite(value):
    return isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value)


def test_quick_compare_writes_table_json_and_plots(tmp_path):
    out = tmp_path / "compare"
    command = [sys.executable, "-m", "riskbound.cli", "bench", "compare", "--quick", "--out", str(out)]
    process = subprocess.Popen(command, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True,
                               start_new_session=True, env=dict(os.environ, OPENBLAS_NUM_THREADS="1"))
    try:
        output, _ = process.communicate(timeout=170)
    finally:
        if process.poll() is None:
            os.killpg(process.pid, signal.SIGKILL)
            process.wait()
    assert process.returncode == 0, output[-3000:]
    assert "suite 1/2" in output and "pruning:" in output  # progress is printed
    for name in ("compare.md", "compare.json", "solve_ms_vs_walkers.png", "cost_gap_hist.png", "success_rates.png"):
        assert (out / name).stat().st_size > 0, name
    with open(out / "compare.json") as stream:
        report = json.load(stream)

    suite = report["suite"]
    assert suite["instances"] == 2
    assert set(suite["methods"]) == {"ours", "mixed_integer", "linearised", "robust_inflation"}
    for method, figures in suite["methods"].items():
        for key in SUITE_KEYS:
            assert _finite(figures[key]), (method, key, figures[key])
        assert 0.0 <= figures["success_rate"] <= 1.0
        assert 0.0 <= figures["collision_probability_mean"] <= figures["collision_probability_max"] <= 1.0
        assert figures["solve_ms_median"] > 0.0
    reference = suite["methods"]["mixed_integer"]
    assert reference["speedup_vs_mixed_integer"] == 1.0 and reference["cost_gap_mean"] == 0.0
    ours = suite["methods"]["ours"]
    assert ours["speedup_vs_mixed_integer"] == reference["solve_ms_median"] / ours["solve_ms_median"]

    crowd = report["crowd"]
    assert crowd["sizes"] == [10, 40] and crowd["seeds"] == 1
    assert set(crowd["methods"]) == {"ours", "linearised", "robust_inflation"}
    for method, by_size in crowd["methods"].items():
        assert set(by_size) == {"10", "40"}
        for size, figures in by_size.items():
            for key in CROWD_KEYS:
                assert _finite(figures[key]), (method, size, key)
            assert figures["success_rate"] + figures["collision_rate"] <= 1.0 + 1e-12
            assert 0.0 <= figures["collision_probability_max"] <= 1.0
            assert 0.0 <= figures["collision_probability_max_considered"] <= 1.0

    pruning = report["pruning"]
    for key in PRUNING_KEYS:
        assert _finite(pruning[key]), key
    assert (pruning["walkers_low"], pruning["walkers_high"]) == (40, 200)
    assert math.isclose(pruning["ratio"], pruning["solve_ms_median_high"] / pruning["solve_ms_median_low"])
    assert math.isclose(pruning["ratio_far"],
                        pruning["solve_ms_median_replay_high_far"] / pruning["solve_ms_median_replay_low"])

    assert report["alpha"] == 0.05
    for name in TARGETS:
        target = report["targets"][name]
        assert _finite(target["target"]) and _finite(target["measured"]) and isinstance(target["met"], bool)
    table = (out / "compare.md").read_text()
    assert "| ours (ellipse MPC) |" in table and "## Targets" in table
