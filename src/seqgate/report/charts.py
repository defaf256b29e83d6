"""Chart plumbing shared by the HTML report sections (matplotlib imported lazily by the callers).

- :func:`new_axes` — a headless (Agg) figure of the report's chart size.
- :func:`finish_error_axes` — the common look of an error curve: log scale, a dotted ``atol``
  line when a tolerance applies, labels, grid, legend outside the axes.
- :func:`png_data_uri` — the figure as a ``data:image/png;base64,…`` URI (closed afterwards), so
  a report is one self-contained HTML file.
"""

from __future__ import annotations

import base64
import io
from typing import Any


def new_axes(size: tuple[float, float] = (8.5, 3.4)) -> tuple[Any, Any]:
    """``(figure, axes)`` on the Agg backend (no display needed)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt.subplots(figsize=size)


def finish_error_axes(ax: Any, atol: Any, xlabel: str, ylabel: str, title: str) -> None:
    """Log-scale y, the ``atol`` line (when given), labels, grid and the legend right of the axes."""
    if atol:
        ax.axhline(float(atol), color="#8a1610", ls=":", lw=1, label=f"atol {atol:g}")
    ax.set_yscale("log")
    ax.set_xlabel(xlabel)
    ax.set_ylabel(ylabel)
    ax.set_title(title)
    ax.grid(alpha=0.3)
    ax.legend(fontsize=7, loc="upper left", bbox_to_anchor=(1.01, 1.0))


def png_data_uri(fig: Any) -> str:
    """The figure as a PNG data URI; the figure is closed."""
    import matplotlib.pyplot as plt

    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=110, bbox_inches="tight")
    plt.close(fig)
    return "data:image/png;base64," + base64.b64encode(buf.getvalue()).decode("ascii")
