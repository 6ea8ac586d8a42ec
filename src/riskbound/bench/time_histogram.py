"""Histogram PNG of per-cycle times for several series, with the target marked."""

import numpy as np


def write_time_histogram(samples, path, target_ms, target_label, xlabel, ylabel, title):
    """samples: {label: times [ms]}. Times above the largest series' 99.5th percentile go in the last bin."""
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(7, 4))
    upper = max(np.percentile(v, 99.5) for v in samples.values())
    bins = np.linspace(0.0, upper, 60)
    for label, values in samples.items():
        ax.hist(np.clip(values, 0, upper), bins=bins, histtype="step", linewidth=1.5, label=label)
    ax.axvline(target_ms, color="grey", linestyle="--", linewidth=1, label=target_label)
    ax.set_xlabel(xlabel)
    ax.set_ylabel(ylabel)
    ax.set_title(title)
    ax.legend()
    fig.tight_layout()
    fig.savefig(path, dpi=120)
    plt.close(fig)
