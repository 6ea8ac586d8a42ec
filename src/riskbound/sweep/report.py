"""The operator's report from a sweep's results: rates with confidence intervals per α, plots, and
a Markdown summary that shows the trade-off and recommends no α.

Rates are shares of runs (one run = one crossing). Their intervals are the exact binomial
confidence intervals from beta-distribution quantiles (Biometrika 26(4), 404-413, 1934):
for k events in n runs at confidence 1 − γ, lower = B⁻¹(γ/2; k, n − k + 1) (0 when k = 0) and
upper = B⁻¹(1 − γ/2; k + 1, n − k) (1 when k = n). They never fall outside [0, 1] and hold their
coverage for the small n of a sweep (at least the nominal level), where the normal approximation
does not.
"""

import math
from collections import defaultdict
from pathlib import Path

import numpy as np
from scipy.stats import beta

from riskbound.bench.crowd_loop import NEAR_MISS_CLEARANCE_M
from riskbound.sweep.store import ResultStore

CONFIDENCE = 0.95
# A run froze when the robot stood for at least this long on its way (our choice, no source: a
# second of standing among walkers is what people notice).
FREEZE_S = 1.0
# (column name, label, test on a row)
RATES = (
    ("reached_goal", "goal reached", lambda row: bool(row["reached_goal"])),
    ("walker_contact", "walker contact", lambda row: row["walker_contacts"] > 0),
    ("near_miss", f"near miss (< {NEAR_MISS_CLEARANCE_M:g} m)", lambda row: row["near_misses"] > 0),
    ("froze", f"froze (stood ≥ {FREEZE_S:g} s)", lambda row: row["longest_stop_s"] >= FREEZE_S),
    ("static_contact", "wall/obstacle contact", lambda row: row["static_contact_frames"] > 0),
)
FIGURES = ("outcome_rates.png", "min_clearance.png", "time_to_goal.png")
_DPI = 90


def binomial_interval(events, runs, confidence=CONFIDENCE):
    """Exact binomial confidence interval (lower, upper) for `events` in `runs` (module docstring)."""
    if not (isinstance(runs, (int, np.integer)) and runs >= 1):
        raise ValueError(f"runs={runs!r}: must be an integer >= 1")
    if not (isinstance(events, (int, np.integer)) and 0 <= events <= runs):
        raise ValueError(f"events={events!r}: must be an integer in [0, runs={runs}]")
    if not 0.0 < confidence < 1.0:
        raise ValueError(f"confidence={confidence!r}: must be in (0, 1)")
    gamma = 1.0 - confidence
    lower = 0.0 if events == 0 else float(beta.ppf(gamma / 2.0, events, runs - events + 1))
    upper = 1.0 if events == runs else float(beta.ppf(1.0 - gamma / 2.0, events + 1, runs - events))
    return lower, upper


def group_label(row):
    """The cell dimensions other than α and seed, in words."""
    parts = [Path(row["scenario"]).stem, Path(row["params_file"]).stem, row["effective_robot_model"],
             row["risk_allocation"], f"reaction {row['reaction_strength_m2_s2']:g}"]
    return ", ".join(parts)


def summarise(rows):
    """{group label: {α: statistics dict}} from store rows."""
    groups = defaultdict(lambda: defaultdict(list))
    for row in rows:
        groups[group_label(row)][row["risk_level"]].append(row)
    summary = {}
    for label in sorted(groups):
        summary[label] = {}
        for alpha in sorted(groups[label]):
            runs = groups[label][alpha]
            n = len(runs)
            stats = {"runs": n}
            for name, _, test in RATES:
                k = sum(1 for row in runs if test(row))
                stats[name] = (k, k / n, *binomial_interval(k, n))
            clearance = np.array([row["min_clearance_m"] for row in runs], float)
            times = np.array([row["time_to_goal_s"] for row in runs if row["reached_goal"]], float)
            cycles = sum(row["cycles"] for row in runs)
            stats["min_clearance_m"] = clearance
            stats["time_to_goal_s"] = times
            stats["least_violation_share"] = sum(row["least_violation_cycles"] for row in runs) / max(cycles, 1)
            stats["failed_share"] = sum(row["failed_cycles"] for row in runs) / max(cycles, 1)
            p95 = [row["solve_ms_p95"] for row in runs if row["solve_ms_p95"] is not None]
            stats["solve_ms_p95"] = float(np.median(p95)) if p95 else math.nan
            summary[label][alpha] = stats
    return summary


def _pct(k_rate_low_high):
    k, rate, low, high = k_rate_low_high
    return f"{100 * rate:.0f} % ({100 * low:.0f}–{100 * high:.0f})"


def _quantiles(values, digits=2):
    if len(values) == 0:
        return "—"
    low, mid = np.percentile(values, [5, 50])
    return f"{mid:.{digits}f} ({low:.{digits}f})"


def markdown(summary, rows, figures):
    versions = sorted({row["code_version"] for row in rows})
    lines = [
        "# Sweep report: choosing α",
        "",
        f"{len(rows)} closed-loop runs (ROS-free, `riskbound sweep`), code {', '.join(versions)}.",
        "Every rate is the share of runs with the outcome, with its exact binomial "
        f"{100 * CONFIDENCE:.0f} % confidence interval in brackets (beta-quantile interval, "
        "Biometrika 26(4), 404-413, 1934).",
        "",
        "What the columns mean: *goal reached* within the crossing's time or cycle cap; *walker contact* — "
        "the clearance between the robot and a walker (as the closed-loop verdicts measure it) went below 0 "
        f"at least once; *near miss* — it went below {NEAR_MISS_CLEARANCE_M:g} m; *froze* — the robot stood "
        f"(speed < 0.05 m/s) for {FREEZE_S:g} s or longer on its way; *wall/obstacle contact* — the robot's disc "
        "reached a wall or fixed obstacle of the scenario (riskbound.crowd.static_map); *min clearance* — median "
        "over runs of each run's smallest clearance to a walker, 5th percentile in brackets [m]; *time to goal* — "
        "median (5th percentile) over the runs that arrived [s]; *least-violation / failed cycles* — share of all "
        "planning cycles whose plan entered a walker's ellipse (the risk bound did not hold for it) / that gave "
        "no plan (the robot braked); *solve p95* — median over runs of each run's 95th-percentile solve time "
        "[ms] (depends on the machine).",
        "",
    ]
    for label, by_alpha in summary.items():
        lines += [f"## {label}", "",
                  "| α | runs | goal reached | walker contact | near miss | froze | wall/obstacle contact | "
                  "min clearance m | time to goal s | least-violation cycles | failed cycles | solve p95 ms |",
                  "|---|---|---|---|---|---|---|---|---|---|---|---|"]
        for alpha, stats in by_alpha.items():
            lines.append(
                f"| {alpha:g} | {stats['runs']} | {_pct(stats['reached_goal'])} | {_pct(stats['walker_contact'])} | "
                f"{_pct(stats['near_miss'])} | {_pct(stats['froze'])} | {_pct(stats['static_contact'])} | "
                f"{_quantiles(stats['min_clearance_m'])} | {_quantiles(stats['time_to_goal_s'], 1)} | "
                f"{100 * stats['least_violation_share']:.1f} % | {100 * stats['failed_share']:.1f} % | "
                f"{stats['solve_ms_p95']:.1f} |")
        alphas = list(by_alpha)
        if len(alphas) >= 2:
            low, high = by_alpha[alphas[0]], by_alpha[alphas[-1]]
            lines += ["", f"From α = {alphas[0]:g} to α = {alphas[-1]:g}: goal reached "
                      f"{100 * low['reached_goal'][1]:.0f} % → {100 * high['reached_goal'][1]:.0f} %, walker contact "
                      f"{100 * low['walker_contact'][1]:.0f} % → {100 * high['walker_contact'][1]:.0f} %, near miss "
                      f"{100 * low['near_miss'][1]:.0f} % → {100 * high['near_miss'][1]:.0f} %, froze "
                      f"{100 * low['froze'][1]:.0f} % → {100 * high['froze'][1]:.0f} %, median min clearance "
                      f"{_median(low['min_clearance_m'])} → {_median(high['min_clearance_m'])} m, "
                      "median time to goal "
                      f"{_median(low['time_to_goal_s'], 1)} → {_median(high['time_to_goal_s'], 1)} s. Where two "
                      "intervals overlap, these runs do not tell the two α apart."]
        lines.append("")
    lines += ["## What this report does not do", "",
              "It recommends no α. Which risk of contact is acceptable against how often the robot freezes or "
              "arrives late is the operator's call for the site; the tables and figures show what each α gave in "
              "these synthetic crowds, which are not the site's people.", ""]
    lines += [f"![{name}]({name})" for name in figures] + [""]
    return "\n".join(lines)


def _median(values, digits=2):
    return f"{np.median(values):.{digits}f}" if len(values) else "—"


def _figure_axes(plt, count, columns, width=5.0, height=3.4):
    rows = math.ceil(count / columns)
    figure, axes = plt.subplots(rows, columns, figsize=(width * columns, height * rows), squeeze=False)
    for extra in axes.flat[count:]:
        extra.set_visible(False)
    return figure, axes.flat


def _alpha_axis(axes, alphas):
    axes.set_xscale("log")
    axes.set_xticks(alphas)
    axes.set_xticklabels([f"{a:g}" for a in alphas], fontsize=7)
    axes.minorticks_off()
    axes.set_xlabel("risk level α")
    axes.grid(alpha=0.3)


def plot_rates(summary, path):
    import matplotlib.pyplot as plt

    figure, panels = _figure_axes(plt, len(RATES), 3)
    alphas = sorted({a for by_alpha in summary.values() for a in by_alpha})
    spread = 1.0 + 0.04 * np.arange(len(summary))  # side by side on the log axis
    for panel, (name, title, _) in zip(panels, RATES):
        for offset, (label, by_alpha) in zip(spread / spread.mean(), summary.items()):
            x = np.array(list(by_alpha)) * offset
            rate = np.array([s[name][1] for s in by_alpha.values()])
            low = np.array([s[name][2] for s in by_alpha.values()])
            high = np.array([s[name][3] for s in by_alpha.values()])
            panel.errorbar(x, 100 * rate, yerr=100 * np.vstack([rate - low, high - rate]), marker="o", markersize=3,
                           capsize=2, linewidth=1.0, label=label)
        panel.set_title(title, fontsize=9)
        panel.set_ylabel("share of runs [%]")
        panel.set_ylim(-3, 103)
        _alpha_axis(panel, alphas)
    handles, labels = panels[0].get_legend_handles_labels()
    figure.legend(handles, labels, loc="center", bbox_to_anchor=(0.83, 0.27), fontsize=7,
                  title="cells (scenario, parameters, robot, allocation, walker reaction)", title_fontsize=7)
    figure.suptitle(f"outcome rates against α, {100 * CONFIDENCE:.0f} % exact binomial intervals", fontsize=10)
    figure.tight_layout()
    figure.savefig(path, dpi=_DPI)
    plt.close(figure)


def _box_plot(summary, field, ylabel, title, path, reference=None):
    import matplotlib.pyplot as plt

    figure, panels = _figure_axes(plt, len(summary), min(len(summary), 2), width=6.0)
    for panel, (label, by_alpha) in zip(panels, summary.items()):
        alphas = list(by_alpha)
        data = [s[field] for s in by_alpha.values()]
        positions = np.arange(len(alphas))
        filled = [(p, d) for p, d in zip(positions, data) if len(d)]
        if filled:
            panel.boxplot([d for _, d in filled], positions=[p for p, _ in filled], widths=0.5, showfliers=True,
                          flierprops={"markersize": 3})
        for p, d in zip(positions, data):
            panel.annotate(f"n={len(d)}", (p, 0.01), xycoords=("data", "axes fraction"), ha="center", fontsize=6)
        if reference is not None:
            panel.axhline(reference[0], color="tab:red", linewidth=1.0, linestyle="--", label=reference[1])
            panel.axhline(0.0, color="black", linewidth=1.0)
            panel.legend(fontsize=6)
        panel.set_xticks(positions)
        panel.set_xticklabels([f"{a:g}" for a in alphas], fontsize=7)
        panel.set_xlabel("risk level α")
        panel.set_ylabel(ylabel)
        panel.set_title(label, fontsize=8)
        panel.grid(alpha=0.3)
    figure.suptitle(title, fontsize=10)
    figure.tight_layout()
    figure.savefig(path, dpi=_DPI)
    plt.close(figure)


def write_report(db_path, out_dir):
    """report.md and the PNG figures of FIGURES in out_dir from the results at db_path. Returns the
    paths written. Raises ValueError when the database has no runs."""
    import matplotlib

    matplotlib.use("Agg")
    with ResultStore(db_path) as store:
        rows = store.rows()
    if not rows:
        raise ValueError(f"results database {db_path}: no runs to report")
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    summary = summarise(rows)
    plot_rates(summary, out_dir / FIGURES[0])
    _box_plot(summary, "min_clearance_m", "smallest clearance to a walker [m]\n(< 0: contact)",
              "minimum clearance per run against α", out_dir / FIGURES[1],
              reference=(NEAR_MISS_CLEARANCE_M, f"near miss below {NEAR_MISS_CLEARANCE_M:g} m"))
    _box_plot(summary, "time_to_goal_s", "time to goal [s] (runs that arrived)", "time to goal against α",
              out_dir / FIGURES[2])
    report = out_dir / "report.md"
    report.write_text(markdown(summary, rows, FIGURES), encoding="utf-8")
    return [report] + [out_dir / name for name in FIGURES]
