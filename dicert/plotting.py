"""Figures (matplotlib, Agg backend), written atomically. Output edge of the pipeline."""

from __future__ import annotations

import io
from collections.abc import Sequence

from dicert._format import fmt
from dicert._io import atomic_write_bytes


def _figure():
    import matplotlib

    matplotlib.use("Agg", force=True)
    import matplotlib.pyplot as plt

    return plt


#: File extensions --plot accepts (matplotlib's vector and raster formats dicert documents).
PLOT_FORMATS = ("png", "svg", "pdf")
#: Algebraic range of the CHSH value (no-signalling maximum 4; common practice).
CHSH_RANGE = (-4.0, 4.0)


def check_plot_path(path, option: str = "--plot") -> None:
    """Refuse, before any work, a plot path whose extension is not PNG, SVG or PDF
    (ParameterError: one line, exit 2)."""
    from pathlib import Path

    from dicert.errors import ParameterError

    p = Path(path)
    ext = p.suffix.lower().lstrip(".")
    if ext not in PLOT_FORMATS:
        got = f"extension {p.suffix!r}" if p.suffix else "no extension"
        raise ParameterError(f"{option} {path}: {got}; use one of "
                             + ", ".join("." + e for e in PLOT_FORMATS))
    # A missing directory, a read-only or full disk: the OS error names the path when the
    # figure is written (atomically; nothing is half-written), like every other output.


def save_figure(fig, path) -> None:
    """Render ``fig`` (format from the extension, PNG by default) and write it atomically."""
    fmt = str(path).rsplit(".", 1)[-1].lower() if "." in str(path) else "png"
    buf = io.BytesIO()
    fig.savefig(buf, format=fmt, dpi=120, bbox_inches="tight", metadata={"Software": None} if fmt == "png" else None)
    atomic_write_bytes(path, buf.getvalue())


def chsh_axis_range(values: Sequence[float], *, lines: Sequence[float] = (),
                    span: float = 0.05) -> tuple[float, float]:
    """y range for CHSH values: from the data (intervals clipped to [-4, 4]) and the reference
    lines that matter, padded by 8%, at least ``span`` wide, always inside [-4, 4].

    Data near 2 (photonic, S ~ 2.03) are not squashed under a far 2 sqrt2 line: only the lines
    passed in ``lines`` widen the range.
    """
    lo_b, hi_b = CHSH_RANGE
    pts = [min(hi_b, max(lo_b, float(v))) for v in (*values, *lines) if v == v]
    if not pts:
        return lo_b, hi_b
    lo, hi = min(pts), max(pts)
    if hi - lo < span:
        mid = 0.5 * (lo + hi)
        lo, hi = mid - span / 2, mid + span / 2
    pad = 0.08 * (hi - lo)
    return max(lo_b, lo - pad), min(hi_b, hi + pad)


def plot_chsh_blocks(blocks: Sequence, path, *, eps: float, title: str = "CHSH value per block",
                     overall: float | None = None, overall_lower: float | None = None,
                     threshold: float | None = None, threshold_label: str = "") -> None:
    """Plot the martingale CHSH estimate of each block with its interval (see estimate.block_estimates).

    Intervals are clipped to the algebraic range [-4, 4]; the overall estimate, its lower
    confidence bound and the protocol's acceptance threshold are drawn when given; the
    local bound 2 and the Tsirelson bound 2 sqrt2 are drawn when they fall in the data's range.
    The legend sits outside the axes, below them.
    """
    from dicert.entropy.analytic import TSIRELSON

    lo_b, hi_b = CHSH_RANGE
    plt = _figure()
    fig, ax = plt.subplots(figsize=(8, 4.2))
    mids = [b.first_trial + b.trials / 2 for b in blocks]
    vals = [min(hi_b, max(lo_b, b.chsh_estimate)) for b in blocks]
    lows = [max(lo_b, b.chsh_lower_bound) for b in blocks]
    highs = [min(hi_b, b.chsh_upper_bound) for b in blocks]
    lo = [max(0.0, v - x) for v, x in zip(vals, lows)]
    hi = [max(0.0, x - v) for v, x in zip(vals, highs)]
    clipped = any(b.chsh_lower_bound < lo_b or b.chsh_upper_bound > hi_b for b in blocks)
    ax.errorbar(mids, vals, yerr=[lo, hi], fmt="o", ms=3, capsize=2,
                label=f"block estimate, interval at eps={eps:g} per side"
                      + (" (clipped to [-4, 4])" if clipped else ""))
    # The local bound 2 always shows (it is what the data must beat); 2 sqrt2 only if in range.
    wanted = [2.0, *(v for v in (overall, overall_lower, threshold) if v is not None)]
    # The intervals of small blocks can be wide; the range follows the estimates, the wanted
    # lines and the intervals only as far as the algebraic range allows.
    ymin, ymax = chsh_axis_range([*vals, *lows, *highs], lines=wanted)
    for level, style, label in ((2.0, "--", "local bound 2"),
                                (TSIRELSON, ":", "Tsirelson bound 2\u221a2")):
        if ymin <= level <= ymax:
            ax.axhline(level, color="grey", ls=style, lw=1, label=label)
    if overall is not None:
        ax.axhline(overall, color="tab:green", ls="-", lw=1.2,
                   label=f"CHSH estimate {fmt(overall, 'chsh')}")
    if overall_lower is not None and lo_b <= overall_lower:
        ax.axhline(overall_lower, color="tab:green", ls="--", lw=1,
                   label=f"CHSH lower bound {fmt(overall_lower, 'lower')}")
    if threshold is not None:
        ax.axhline(threshold, color="tab:red", ls="-.", lw=1.2,
                   label=threshold_label or f"protocol threshold {threshold:.4f}")
    ax.set_ylim(ymin, ymax)
    ax.set_xlabel("trial index")
    ax.set_ylabel("CHSH value S")
    ax.set_title(title)
    ax.legend(fontsize=8, loc="upper center", bbox_to_anchor=(0.5, -0.16), ncol=2,
              frameon=False)
    save_figure(fig, path)
    plt.close(fig)
