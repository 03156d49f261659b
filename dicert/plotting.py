"""Figures (matplotlib, Agg backend), written atomically. Output edge of the pipeline."""

from __future__ import annotations

import io
from collections.abc import Sequence

from dicert._io import atomic_write_bytes


def _figure():
    import matplotlib

    matplotlib.use("Agg", force=True)
    import matplotlib.pyplot as plt

    return plt


def save_figure(fig, path) -> None:
    """Render ``fig`` (format from the extension, PNG by default) and write it atomically."""
    fmt = str(path).rsplit(".", 1)[-1].lower() if "." in str(path) else "png"
    buf = io.BytesIO()
    fig.savefig(buf, format=fmt, dpi=120, bbox_inches="tight", metadata={"Software": None} if fmt == "png" else None)
    atomic_write_bytes(path, buf.getvalue())


def plot_chsh_blocks(blocks: Sequence, path, *, eps: float, title: str = "CHSH value per block") -> None:
    """Plot the martingale CHSH estimate of each block with its interval (see estimate.block_estimates)."""
    from dicert.entropy.analytic import TSIRELSON

    plt = _figure()
    fig, ax = plt.subplots(figsize=(8, 4))
    mids = [b.first_trial + b.trials / 2 for b in blocks]
    vals = [b.chsh for b in blocks]
    lo = [b.chsh - b.chsh_lower for b in blocks]
    hi = [b.chsh_upper - b.chsh for b in blocks]
    ax.errorbar(mids, vals, yerr=[lo, hi], fmt="o", ms=3, capsize=2, label=f"block estimate, interval at eps={eps:g} per side")
    ax.axhline(2.0, color="grey", ls="--", lw=1, label="local bound 2")
    ax.axhline(TSIRELSON, color="grey", ls=":", lw=1, label="Tsirelson bound 2\u221a2")
    ax.set_xlabel("trial index")
    ax.set_ylabel("CHSH value S")
    ax.set_title(title)
    ax.legend(fontsize=8, loc="lower right")
    save_figure(fig, path)
    plt.close(fig)
