"""Figures of Stokes imaging: the polarization ellipses drawn over the intensity image."""

from __future__ import annotations

from pathlib import Path

import numpy as np


def plot_ellipses(stokes: np.ndarray, path: Path, *, title: str = "", step: int | None = None,
                  threshold: float = 0.1) -> Path:
    """Draw S0 as an image and a polarization ellipse every ``step`` pixels where S0 is above
    ``threshold`` of its maximum: major axis along the orientation, axis ratio tan|chi|, red for
    right-handed (S3 > 0), blue for left-handed, white for linear. ``stokes`` is (4, rows, cols)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from matplotlib.patches import Ellipse

    s = np.asarray(stokes, dtype=float)
    s0 = s[0]
    rows, cols = s0.shape
    step = step or max(2, min(rows, cols) // 16)
    fig, ax = plt.subplots(figsize=(5.5, 5))
    image = ax.imshow(np.nan_to_num(s0), origin="lower", cmap="gray")
    fig.colorbar(image, ax=ax, label="S0 (ADU)")
    peak = np.nanmax(s0) if np.isfinite(s0).any() else 0.0
    for y in range(step // 2, rows, step):
        for x in range(step // 2, cols, step):
            v = s[:, y, x]
            if not np.all(np.isfinite(v)) or v[0] < threshold * peak or v[0] <= 0:
                continue
            p = float(np.linalg.norm(v[1:]))
            if p <= 0:
                continue
            psi = 0.5 * np.degrees(np.arctan2(v[2], v[1]))
            chi = 0.5 * np.arcsin(np.clip(v[3] / p, -1, 1))
            size = 0.9 * step * min(1.0, p / v[0])
            colour = "white" if abs(np.degrees(chi)) < 3 else ("red" if chi > 0 else "dodgerblue")
            ax.add_patch(Ellipse((x, y), size, max(size * abs(np.tan(chi)), 0.04 * step), angle=psi,
                                 fill=False, color=colour, lw=1.0))
    ax.set_xlabel("x (pixel)")
    ax.set_ylabel("y (pixel)")
    ax.set_title(title or "polarization ellipses over intensity")
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, dpi=110, bbox_inches="tight")
    plt.close(fig)
    return path
