"""Reliability diagrams as PNG files (needs the optional ``plot`` extra: matplotlib).

matplotlib is imported inside :func:`reliability_png`, so the rest of streamrate
never pays for it and works without it.
"""

from __future__ import annotations

from collections.abc import Mapping
from pathlib import Path

import numpy as np

from streamrate.calibration import ECE_BINS, expected_calibration_error, reliability_curve
from streamrate.errors import ConfigError

# Colour-blind-safe qualitative palette (common practice), cycled for many models.
_COLOURS = ("#0072B2", "#D55E00", "#009E73", "#CC79A7", "#E69F00", "#56B4E9", "#000000", "#F0E442")


def reliability_png(
    path: Path | str,
    forecasts: Mapping[str, np.ndarray],
    outcome: np.ndarray,
    *,
    bins: int = ECE_BINS,
    title: str = "Reliability of prequential forecasts",
) -> None:
    """Write a reliability diagram of every model (top) and forecast counts (bottom)."""
    try:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError as exc:
        raise ConfigError("plots need matplotlib: pip install 'streamrate[plot]'") from exc

    fig, (top, bottom) = plt.subplots(
        2, 1, figsize=(7.0, 8.0), height_ratios=(3, 1), sharex=True, layout="constrained"
    )
    top.plot([0, 1], [0, 1], color="#999999", linestyle="--", linewidth=1, label="perfect")
    edges = np.linspace(0.0, 1.0, bins + 1)
    width = 1.0 / bins / max(len(forecasts), 1)
    for k, (label, e) in enumerate(forecasts.items()):
        colour = _COLOURS[k % len(_COLOURS)]
        curve = reliability_curve(e, outcome, bins)
        ece = expected_calibration_error(e, outcome, bins)
        top.plot(
            curve.mean_forecast,
            curve.mean_outcome,
            marker="o",
            markersize=4,
            color=colour,
            label=f"{label} (ECE {ece:.3f})",
        )
        counts = np.histogram(np.clip(e, 0.0, 1.0), bins=edges)[0]
        bottom.bar(edges[:-1] + k * width, counts, width=width, align="edge", color=colour)
    top.set_xlim(0.0, 1.0)
    top.set_ylim(0.0, 1.0)
    top.set_ylabel("mean score of the first side")
    top.set_title(title)
    top.grid(alpha=0.3)
    top.legend(loc="upper left", fontsize="small")
    bottom.set_xlabel(f"forecast expected score ({bins} equal-width bins)")
    bottom.set_ylabel("matches")
    bottom.grid(alpha=0.3)
    Path(path).parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, dpi=110)
    plt.close(fig)
