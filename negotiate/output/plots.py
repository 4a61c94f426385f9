"""Charts of a run, a sweep and a method comparison, drawn with matplotlib into PNG bytes.

Every function takes plain rows (as read back by :mod:`negotiate.output.results`, or made by
:mod:`negotiate.tools.sweep` and :mod:`negotiate.tools.compare`) and returns a
:class:`matplotlib.figure.Figure`; :func:`png` turns one into PNG bytes. The look is deliberately plain:
white background, light grid, one colour-blind-safe palette (Okabe and Ito's eight colours), SI units on
every axis (SI prefixes where numbers are large).
"""

from __future__ import annotations

import functools
import io
import math
from collections.abc import Callable, Mapping, Sequence
from typing import TYPE_CHECKING, Any

import matplotlib

matplotlib.use("Agg")  # no display: files only

import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
from cycler import cycler  # noqa: E402  (a dependency of matplotlib, which re-exports it)
from matplotlib.artist import Artist  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402
from matplotlib.lines import Line2D  # noqa: E402
from matplotlib.patches import Patch  # noqa: E402
from matplotlib.ticker import EngFormatter, FuncFormatter, NullFormatter, ScalarFormatter  # noqa: E402

if TYPE_CHECKING:
    from matplotlib.typing import RcKeyType

__all__ = [
    "PALETTE",
    "capacity_chart",
    "compare_chart",
    "convergence_chart",
    "png",
    "slot_chart",
    "space_time_chart",
    "sweep_chart",
    "trajectory_chart",
]

# Okabe & Ito's colour-blind-safe palette, ordered so that neighbours differ strongly (black kept for limits).
PALETTE = ("#0072B2", "#E69F00", "#009E73", "#D55E00", "#CC79A7", "#56B4E9", "#F0E442", "#000000")
INK = "#222222"
MAX_LABELLED_ROWS = 40
"""Slot charts with more users number the rows instead of naming them."""
MAX_LEGEND_USERS = 12
"""Share charts with more users have no legend of users."""
GRID = "#DDDDDD"

_STYLE: dict[RcKeyType, Any] = {
    "figure.facecolor": "white",
    "axes.facecolor": "white",
    "axes.edgecolor": "#888888",
    "axes.grid": True,
    "grid.color": GRID,
    "grid.linewidth": 0.6,
    "axes.axisbelow": True,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.titlesize": 11,
    "axes.titleweight": "bold",
    "axes.labelsize": 10,
    "axes.labelcolor": INK,
    "xtick.color": INK,
    "ytick.color": INK,
    "font.size": 9.5,
    "legend.frameon": False,
    "legend.fontsize": 8.5,
    "axes.prop_cycle": cycler(color=PALETTE[:7]),
}


def _styled(fn: Callable[..., Figure]) -> Callable[..., Figure]:
    """Draw the whole figure (legends and titles included) under the module's style."""

    @functools.wraps(fn)
    def wrapper(*args: Any, **kwargs: Any) -> Figure:
        with plt.rc_context(_STYLE):
            return fn(*args, **kwargs)

    return wrapper


def colour(i: int) -> str:
    """The i-th palette colour (black excluded, cycling)."""
    return PALETTE[i % 7]


def _figure(width: float, height: float, ncols: int = 1, nrows: int = 1, **kw: Any) -> tuple[Figure, Any]:
    fig = Figure(figsize=(width, height), dpi=100, layout="constrained")
    axes = fig.subplots(nrows, ncols, squeeze=False, **kw)
    for ax in axes.ravel():
        _style(ax)
    return fig, axes


def _style(ax: Any) -> None:
    for k, v in (("top", False), ("right", False)):
        ax.spines[k].set_visible(v)
    ax.grid(True, color=GRID, linewidth=0.6)
    ax.set_axisbelow(True)


def png(fig: Figure) -> bytes:
    """The figure as PNG bytes (100 dpi)."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=100, facecolor="white")
    return buf.getvalue()


def _eng(unit: str) -> Any:
    """SI prefixes with a unit (450 kW); without a unit, k/M/G only for large numbers (no milli-costs)."""
    if unit:
        return EngFormatter(unit=unit, sep=" ")

    def fmt(v: float, _pos: Any = None) -> str:
        a = abs(v)
        for scale, suffix in ((1e9, "G"), (1e6, "M"), (1e3, "k")):
            if a >= scale:
                return f"{v / scale:g}{suffix}"
        return f"{v:g}"

    return FuncFormatter(fmt)


def _axis_format(ax: Any, unit: str) -> None:
    """SI prefixes for power and energy (W, J); plain numbers without offset for the other units."""
    if unit in ("W", "J"):
        ax.yaxis.set_major_formatter(_eng(unit))
    else:
        ax.yaxis.set_major_formatter(ScalarFormatter(useOffset=False))


# ---------------------------------------------------------------------------------------------------------
# run charts


@_styled
def slot_chart(resource: str, slots: Sequence[Any], gap: float, free: Mapping[str, tuple[float, float]] | None = None,
               part: str | None = None) -> Figure:  # fmt: skip
    """Slots on one exclusive resource: time on x, one row per user (in order of entry).

    ``slots`` have ``agent``, ``enter`` and ``leave`` (s); ``gap`` (s) is drawn after each slot as the
    required clearance; ``free`` optionally maps an agent to its free-optimum (enter, leave), drawn as an
    outline so that the shift is visible. ``part`` names the group of users drawn (e.g. "users 31–60").
    """
    rows = sorted(slots, key=lambda r: r.enter)
    n = len(rows)
    per_row = min(0.42, 12.0 / max(n, 1))  # inches; a long queue is compressed to about 13 in in all
    fig, axes = _figure(9.0, 1.4 + per_row * max(n, 1))
    ax = axes[0, 0]
    for i, r in enumerate(rows):
        y = n - 1 - i
        c = PALETTE[0]  # one colour: the rows are labelled, and a cycling palette would repeat colours
        ax.barh(y, r.leave - r.enter, left=r.enter, height=0.6, color=c, edgecolor="white")
        if gap > 0:
            ax.barh(y, gap, left=r.leave, height=0.6, color="none", edgecolor="#777777", hatch="////", linewidth=0)
        if free and r.agent in free:
            f0, f1 = free[r.agent]
            ax.barh(y, f1 - f0, left=f0, height=0.84, color="none", edgecolor=INK, linewidth=0.9, linestyle=":")
    ax.margins(x=0.02)
    if n <= MAX_LABELLED_ROWS:
        ax.set_yticks(range(n), [r.agent for r in reversed(rows)])
    else:  # names would overlap: number the rows in order of entry instead
        ticks = list(range(0, n, max(1, n // 10)))
        ax.set_yticks([n - 1 - k for k in ticks], [f"#{k + 1}" for k in ticks])
        ax.set_ylabel("users in order of entry")
    ax.set_ylim(-0.7, n - 0.3)
    ax.grid(False, axis="y")
    ax.set_xlabel("time (s)")
    ax.set_title(f"{resource}: slots in order of entry" + (f", {part}" if part else ""))
    handles = [Patch(facecolor=colour(0), label="coordinated slot")]
    if gap > 0:
        handles.append(Patch(facecolor="none", edgecolor="#777777", hatch="////", label=f"required gap {gap:g} s"))
    if free:
        handles.append(Patch(facecolor="none", edgecolor=INK, linestyle=":", label="slot at free optimum"))
    fig.legend(handles=handles, loc="outside lower center", ncols=3)
    return fig


@_styled
def capacity_chart(resource: str, unit: str, blocks: Sequence[Any], shares: Sequence[Any]) -> Figure:
    """Stacked shares per block of one capacity resource against its limit, each split into what is drawn.

    ``blocks`` have ``block``, ``start_s``, ``end_s`` and ``limit``; ``shares`` have ``agent``, ``enter``
    (block start, s), ``share`` and optionally ``draw`` (both in ``unit``). Each user's share is a bar: the
    part the agent plans to draw solid, the part granted but not drawn light and hatched (a share whose
    ``draw`` is ``nan`` or missing is drawn solid as a whole).
    """
    blocks = sorted(blocks, key=lambda b: b.start_s)
    starts = np.array([b.start_s for b in blocks])
    width = np.array([b.end_s - b.start_s for b in blocks])
    users = list(dict.fromkeys(s.agent for s in shares))
    fig, axes = _figure(9.0, 3.6)
    ax = axes[0, 0]
    bottom = np.zeros(len(blocks))
    unused_any = False
    for i, u in enumerate(users):
        h = np.zeros(len(blocks))
        d = np.zeros(len(blocks))
        for s in shares:
            if s.agent == u:
                k = int(np.argmin(np.abs(starts - s.enter)))
                h[k] += s.share
                dv = float(getattr(s, "draw", np.nan))
                d[k] += min(max(dv, 0.0), s.share) if np.isfinite(dv) else s.share
        ax.bar(starts, d, width=width * 0.92, bottom=bottom, align="edge", color=colour(i), label=u,
               edgecolor="white", linewidth=0.5)  # fmt: skip
        unused = h - d
        if np.any(unused > 0):
            unused_any = True
            ax.bar(starts, unused, width=width * 0.92, bottom=bottom + d, align="edge", color=colour(i), alpha=0.3,
                   hatch="////", edgecolor="white", linewidth=0.5, label="_unused")  # fmt: skip
        bottom += h
    lim = np.array([b.limit for b in blocks])
    edges = np.r_[starts, starts[-1] + width[-1]]
    ax.stairs(lim, edges, color=PALETTE[7], linewidth=1.6, label="limit", baseline=None)
    ax.yaxis.set_major_formatter(_eng(unit))
    ax.set_xlabel("time (s)")
    ax.set_ylabel(f"share ({unit})")
    what = "shares per block (solid: planned draw, hatched: unused)" if unused_any else "shares per block"
    if len(users) <= MAX_LEGEND_USERS:
        ax.set_title(f"{resource}: {what} and limit")
        handles, labels = ax.get_legend_handles_labels()
        if unused_any:
            handles.append(Patch(facecolor="#999999", alpha=0.3, hatch="////", edgecolor="white"))
            labels.append("share not drawn")
        ax.legend(handles, labels, loc="upper left", bbox_to_anchor=(1.0, 1.0))
    else:
        ax.set_title(f"{resource}: {what} of {len(users)} users (stacked) and limit (black)")
    return fig


@_styled
def convergence_chart(history: Sequence[Any]) -> Figure:
    """Fleet total (incumbent and trial) and the method's stopping measure (log scale) per round."""
    fig, axes = _figure(9.0, 3.2, ncols=2)
    k = np.array([h.round for h in history])
    best = np.array([h.best_total for h in history], dtype=float)
    trial = np.array([h.trial_total for h in history], dtype=float)
    meas = np.array([h.measure for h in history], dtype=float)
    ax = axes[0, 0]
    ok = np.isfinite(trial)
    ax.plot(k[ok], trial[ok], "o", color=PALETTE[1], markersize=4, label="trial point")
    okb = np.isfinite(best)
    ax.plot(k[okb], best[okb], "-", color=PALETTE[0], linewidth=1.8, label="best so far")
    finite = np.r_[trial[ok], best[okb]]
    if finite.size and finite.min() > 0 and finite.max() > 5 * finite.min():
        ax.set_yscale("log")  # early rounds far above the end: a linear axis would flatten the rest
        ax.set_title("total cost (log scale)")
    else:
        ax.set_title("total cost")
    ax.set_xlabel("round")
    ax.set_ylabel("weighted total cost")
    ax.yaxis.set_major_formatter(_eng(""))
    ax.yaxis.set_minor_formatter(NullFormatter())
    ax.legend()
    ax = axes[0, 1]
    pos = np.isfinite(meas) & (meas > 0)
    if pos.any():
        ax.semilogy(k[pos], meas[pos], "s-", color=PALETTE[2], markersize=4)
    ax.set_xlabel("round")
    ax.set_ylabel("stopping measure (relative)")
    ax.set_title("stopping measure (log scale)")
    for ax in axes.ravel():
        ax.xaxis.get_major_locator().set_params(integer=True)
    return fig


MAX_NAMED_LINES = 16
"""Time-space diagrams with more vehicles label each line with its place in the order only."""


@_styled
def space_time_chart(resource: str, lines: Sequence[Any], gap: float = 0.0) -> Figure:
    """Time-space diagram of the vehicles sharing one exclusive resource: distance to the zone vs time.

    ``lines`` have ``agent``, ``time_s`` and ``distance_m`` (arrays: the vehicle's position along its own
    route minus its position when it enters the zone, so that every route meets the zone at 0), ``enter``
    and ``leave`` (s, the slot) and ``clear_m`` (m, distance at ``leave``: the zone plus the vehicle's
    length when the position is the vehicle's front). The zone's band, 0 to ``clear_m``, is shaded; each
    line is labelled with its place in the order of entry and its agent; ``gap`` (s) is drawn after each
    slot as a hatched stretch of the band.
    """
    rows = sorted(lines, key=lambda r: r.enter)
    n = len(rows)
    fig, axes = _figure(9.0, 4.6)
    ax = axes[0, 0]
    clear = np.array([r.clear_m for r in rows], dtype=float)
    lo_c, hi_c = float(np.nanmin(clear)), float(np.nanmax(clear))
    pad = max(2.5 * hi_c, 40.0)  # m shown before and after the zone: enough to see the approach and the queue
    y0, y1 = -pad, hi_c + pad
    longer = hi_c - lo_c > 1e-3 * max(hi_c, 1.0)  # vehicles of different lengths clear the zone at different distances
    ax.axhspan(0.0, lo_c, color=PALETTE[5], alpha=0.22, linewidth=0)
    if longer:  # vehicles of different lengths clear the zone at different distances
        ax.axhspan(lo_c, hi_c, color=PALETTE[5], alpha=0.10, linewidth=0)
    t_lo, t_hi = math.inf, -math.inf
    label_names = n <= MAX_NAMED_LINES
    for i, r in enumerate(rows):
        c = PALETTE[i % 6]  # no yellow: a thin yellow line is hard to see on white
        t = np.asarray(r.time_s, dtype=float)
        d = np.asarray(r.distance_m, dtype=float)
        ok = np.isfinite(t) & np.isfinite(d)
        t, d = t[ok], d[ok]
        near = (d >= y0) & (d <= y1)
        if near.any():  # the stretch drawn, one node beyond on each side so that lines leave the frame
            k = np.flatnonzero(near)
            a, b = max(int(k[0]) - 1, 0), min(int(k[-1]) + 2, t.size)
            t, d = t[a:b], d[a:b]
        ax.plot(t, d, color=c, linewidth=1.6)
        ax.plot([r.enter, r.leave], [0.0, r.clear_m], "o", color=c, markersize=4)
        if gap > 0:
            ax.fill_between([r.leave, r.leave + gap], 0.0, r.clear_m, facecolor="none", edgecolor="#777777",
                            hatch="////", linewidth=0)  # fmt: skip
        t_lo = min(t_lo, float(np.interp(y0, d, t)) if d[0] <= y0 else float(t[0]))
        t_hi = max(t_hi, float(np.interp(y1, d, t)) if d[-1] >= y1 else float(t[-1]))
        # the label sits on the approach, along the line (lines of one zone do not cross there unless they overtake)
        d_lab = -0.5 * pad
        if d.size >= 2 and d[0] <= d_lab:
            t_lab = float(np.interp(d_lab, d, t))
            j = int(np.clip(np.searchsorted(d, d_lab), 1, d.size - 1))
            angle = math.degrees(math.atan2(d[j] - d[j - 1], t[j] - t[j - 1]))
            text = f"{i + 1} {r.agent}" if label_names else f"{i + 1}"
            ax.text(t_lab, d_lab, text, color=c, fontsize=8, fontweight="bold", ha="center", va="center",
                    rotation=angle, rotation_mode="anchor", transform_rotates_text=True,
                    bbox={"boxstyle": "round,pad=0.15", "facecolor": "white", "edgecolor": "none", "alpha": 0.85})
    if math.isfinite(t_lo) and math.isfinite(t_hi) and t_hi > t_lo:
        span = t_hi - t_lo
        ax.set_xlim(t_lo - 0.02 * span, t_hi + 0.02 * span)
    ax.set_ylim(y0, y1)
    ax.set_xlabel("time (s)")
    ax.set_ylabel("distance past the zone entry (m),\nalong each vehicle's own route")
    ax.set_title(f"{resource}: time-space diagram, {n} vehicle{'s' * (n != 1)} in order of entry")
    handles: list[Artist] = [
        Patch(facecolor=PALETTE[5], alpha=0.35, label="zone, from entry until the vehicle has cleared it"),
        Line2D([], [], color=INK, marker="o", linestyle="none", markersize=4, label="slot entry and exit"),
    ]
    if longer:
        handles.append(Patch(facecolor=PALETTE[5], alpha=0.15, label="cleared later by longer vehicles"))
    if gap > 0:
        handles.append(Patch(facecolor="none", edgecolor="#777777", hatch="////", label=f"required gap {gap:g} s"))
    fig.legend(handles=handles, loc="outside lower center", ncols=min(4, len(handles)))
    return fig


# Panels drawn for the trajectory columns of the built-in model families (first match wins).
_PANELS: tuple[tuple[tuple[str, str], tuple[str, str]], ...] = (
    (("position_m", "position"), ("speed_m_per_s", "speed")),
    (("rate_kg_per_s", "processing rate"), ("progress_kg", "progress")),
    (("power_W", "grid power"), ("soc", "state of charge")),
)
_UNITS = {"_m_per_s": "m/s", "_kg_per_s": "kg/s", "_kg": "kg", "_W": "W", "_m": "m", "_N": "N", "_J": "J", "_s": "s"}
_STEPPED = {"rate_kg_per_s", "power_W", "force_N"}  # zero-order hold per stage or block


def _unit_of(col: str) -> tuple[str, str]:
    if col == "soc":
        return "state of charge", "fraction"
    for suffix, unit in _UNITS.items():
        if col.endswith(suffix):
            return col[: -len(suffix)].replace("_", " "), unit
    return col.replace("_", " "), ""


@_styled
def trajectory_chart(agent: str, series: Mapping[str, np.ndarray], slots: Sequence[Any]) -> Figure:
    """An agent's trajectories over time with its slots shaded (and its capacity shares as steps).

    ``series`` maps unit-suffixed column names to arrays (``time_s`` first); ``slots`` are the agent's
    schedule rows (``resource``, ``enter``, ``leave``, ``share`` and ``chart``: ``"slots"`` or ``"shares"``).
    """
    t = np.asarray(series["time_s"], dtype=float)
    cols = [c for c in series if c != "time_s"]
    chosen = None
    for a, b in _PANELS:
        if a[0] in series and b[0] in series:
            chosen = [a, b]
            break
    if chosen is None:
        chosen = [(c, _unit_of(c)[0]) for c in cols[:2]]
    fig, axes = _figure(9.0, 2.7, ncols=len(chosen))
    exclusive = [s for s in slots if s.chart == "slots"]
    shares = [s for s in slots if s.chart == "shares"]
    resources = list(dict.fromkeys(s.resource for s in exclusive))
    for j, (col, title) in enumerate(chosen):
        ax = axes[0, j]
        y = np.asarray(series[col], dtype=float)
        name, unit = _unit_of(col)
        if col in _STEPPED:
            ax.step(t, y, where="post", color=PALETTE[0], linewidth=1.6, label=name)
        else:
            ax.plot(t, y, color=PALETTE[0], linewidth=1.6, marker="." if t.size < 40 else None, label=name)
        for s in exclusive:
            c = colour(1 + resources.index(s.resource))
            ax.axvspan(s.enter, s.leave, color=c, alpha=0.22, linewidth=0)
            ax.axvline(s.enter, color=c, linewidth=0.9)
            ax.axvline(s.leave, color=c, linewidth=0.9)
        if col == "power_W" and shares:
            sh = sorted(shares, key=lambda s: s.enter)
            edges = np.r_[[s.enter for s in sh], sh[-1].leave]
            ax.stairs([s.share for s in sh], edges, color=PALETTE[3], linewidth=5, alpha=0.35,
                      label="allocated share", baseline=None, zorder=1)  # fmt: skip
        _axis_format(ax, unit)
        if np.nanmin(y) >= 0:  # rates, speeds, progress, power, charge: read against zero
            ax.set_ylim(bottom=0, top=max(ax.get_ylim()[1], 1.08 * float(np.nanmax(y)), 1e-12))
        ax.set_xlabel("time (s)")
        ax.set_ylabel(f"{name} ({unit})" if unit else name)
        ax.set_title(title)
    handles: list[Artist] = [
        Patch(facecolor=colour(1 + i), alpha=0.4, label=f"slot on {r}") for i, r in enumerate(resources)
    ]
    if shares:
        handles.append(Line2D([], [], color=PALETTE[3], linewidth=5, alpha=0.35, label="allocated share"))
    if handles:
        fig.legend(handles=handles, loc="outside lower center", ncols=min(4, len(handles)))
    fig.suptitle(agent, fontsize=11, fontweight="bold", x=0.01, ha="left")
    return fig


# ---------------------------------------------------------------------------------------------------------
# sweep and comparison


@_styled
def sweep_chart(sweep: Any, max_multipliers: int = 8) -> Figure:
    """V, dV/dp and the multipliers of the constraints active somewhere along a sweep.

    ``sweep`` is a :class:`negotiate.tools.sweep.SweepResult`. Shaded bands mark the intervals between two points
    whose active sets differ (V may have a kink there); open circles mark points where a constraint is
    weakly active or the certificate says ``nonsmooth``; grey hatched bands the values outside the agent's
    reachable window (:attr:`~negotiate.tools.sweep.SweepResult.in_window`). The ``max_multipliers`` constraints
    with the largest multipliers are drawn (all are in the CSV).
    """
    fig, axes = _figure(8.0, 7.2, nrows=3, sharex=True)
    x = sweep.values
    ok = sweep.converged
    unit = f" ({sweep.unit})" if sweep.unit else ""
    per = f"cost/{sweep.unit}" if sweep.unit else "cost per unit"
    flag = np.array([bool(w) or v == "nonsmooth" for w, v in zip(sweep.weakly_active, sweep.verdict, strict=True)])
    flag &= ok
    few = x.size <= 80
    panels = [
        (axes[0, 0], sweep.value, "V (cost)", "value function V", "-"),
        (axes[1, 0], sweep.slope, f"dV/d{sweep.param} ({per})", f"value gradient dV/d{sweep.param}", ":"),
    ]
    for ax, y, label, title, style in panels:
        ax.plot(x[ok], y[ok], style, color=PALETTE[0], linewidth=1.4)
        if few:
            ax.plot(x[ok], y[ok], "o", color=PALETTE[0], markersize=3)
        if flag.any():
            ax.plot(x[flag], y[flag], "o", mfc="none", mec=PALETTE[3], markersize=8, mew=1.4)
        ax.set_ylabel(label)
        ax.set_title(title)
        ax.yaxis.set_major_formatter(_eng(""))
    if (~ok).any():  # failed solves have no value: mark them on the axis
        ax0 = axes[0, 0]
        ax0.plot(x[~ok], np.zeros((~ok).sum()), "x", color=PALETTE[7], transform=ax0.get_xaxis_transform(),
                 clip_on=False)  # fmt: skip
    ax = axes[2, 0]
    names = list(sweep.multipliers)
    size = {n: float(np.nanmax(np.abs(sweep.multipliers[n]))) if ok.any() else 0.0 for n in names}
    top = sorted(names, key=lambda n: -size[n])[:max_multipliers]
    for i, n in enumerate(top):
        ax.plot(x[ok], sweep.multipliers[n][ok], color=colour(i), linewidth=1.4, label=n)
    ax.axhline(0.0, color="#999999", linewidth=0.8)
    ax.yaxis.set_major_formatter(_eng(""))
    ax.xaxis.set_major_formatter(_eng(""))
    ax.set_ylabel("multiplier")
    ax.set_xlabel(f"{sweep.param}{unit}")
    ax.set_title("multipliers of the constraints active somewhere on the path"
                 + (f" (largest {len(top)} of {len(names)})" if len(names) > len(top) else ""))  # fmt: skip
    if top:
        ax.legend(loc="upper left", bbox_to_anchor=(1.0, 1.0))
    for k in sweep.changes:
        for a in axes.ravel():
            a.axvspan(x[k - 1], x[k], color=PALETTE[4], alpha=0.25, linewidth=0)
    outside = ~sweep.in_window
    if outside.any():  # the agent is never offered these values: grey them out
        lo, hi = sweep.window
        spans = [(x.min(), x.max())] if not np.isfinite(lo) else [(x.min(), lo), (hi, x.max())]
        for a in axes.ravel():
            for s0, s1 in spans:
                if s1 > s0:
                    a.axvspan(s0, s1, facecolor="#BBBBBB", alpha=0.35, hatch="xx", edgecolor="#888888", linewidth=0)
    handles: list[Artist] = []
    if sweep.changes:
        handles.append(Patch(facecolor=PALETTE[4], alpha=0.4, label="active set changes in this interval"))
    else:
        handles.append(Patch(facecolor="none", edgecolor="none", label="the active set is the same at every point"))
    if flag.any():
        handles.append(Line2D([], [], color=PALETTE[3], marker="o", mfc="none", mew=1.4, linestyle="none",
                                  label="weakly active constraint or nonsmooth certificate"))  # fmt: skip
    if (~ok).any():
        handles.append(Line2D([], [], color=PALETTE[7], marker="x", linestyle="none", label="solve failed"))
    if outside.any():
        label = f"outside the reachable window ({int(outside.sum())} of {x.size} points)"
        handles.append(Patch(facecolor="#BBBBBB", alpha=0.5, hatch="xx", edgecolor="#888888", label=label))
    fig.legend(handles=handles, loc="outside lower center", ncols=min(len(handles), 2))
    fig.suptitle(f"{sweep.agent}: sweep of {sweep.param}", fontsize=11, fontweight="bold", x=0.01, ha="left")
    return fig


@_styled
def compare_chart(rows: Sequence[Any], histories: Mapping[str, Sequence[Any]], reference: float | None) -> Figure:
    """Methods side by side: progress against agent solves, and wall time per method.

    ``rows`` are :class:`negotiate.tools.compare.MethodRow`; ``histories`` maps a method name to its rounds;
    ``reference`` is the centralized optimum, if any. With a reference the left panel shows the relative
    gap of each method's best total to it on a log scale (gaps at or below 1e-12, or negative, drawn at
    1e-12); without one, the best total itself.
    """
    fig, axes = _figure(9.0, 3.4, ncols=2)
    ax = axes[0, 0]
    floor = 1e-12
    gap_to = reference if reference is not None and np.isfinite(reference) and reference != 0 else None
    for i, (name, hist) in enumerate(histories.items()):
        s = np.array([h.agent_solves for h in hist])
        b = np.array([h.best_total for h in hist], dtype=float)
        ok = np.isfinite(b)
        if gap_to is not None:
            y = np.maximum((b - gap_to) / abs(gap_to), floor)
            ax.semilogy(s[ok], y[ok], "o-", color=colour(i), markersize=3.5, linewidth=1.4, label=name)
        else:
            ax.plot(s[ok], b[ok], "o-", color=colour(i), markersize=3.5, linewidth=1.4, label=name)
    if gap_to is not None:
        ax.set_ylabel("relative gap to centralized")
        ax.set_title("gap per agent solve (log scale)")
    else:
        ax.set_ylabel("best weighted total cost")
        ax.yaxis.set_major_formatter(_eng(""))
        ax.set_title("best total per agent solve")
    ax.set_xlabel("agent solves")
    ax.legend()
    ax = axes[0, 1]
    names = [r.method for r in rows]
    times = [r.wall_time for r in rows]
    bars = ax.bar(names, times, color=[colour(i) for i in range(len(rows))])
    ax.bar_label(
        bars, labels=[f"{t:.2g} s" if r.status != "error" else "error" for t, r in zip(times, rows, strict=True)]
    )
    ax.set_ylabel("wall time (s)")
    ax.set_title("wall time")
    ax.grid(False, axis="x")
    return fig
