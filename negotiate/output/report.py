"""The run report: one self-contained HTML file built from a run folder's files, never from a solve.

:func:`write_report` reads a folder written by ``negotiate run`` (through :func:`negotiate.output.results.load_run`)
and writes ``report.html`` next to the files: the run summary, a slot chart per exclusive resource and a
share chart per capacity resource (each resource gets the chart its kind declares, headed by its kind's
words), a time-space diagram per exclusive resource used by vehicles (:func:`space_time_lines`), the
table of agents (free-optimum cost, coordinated cost, certificate), the price tables (value
gradients with units), the convergence history and each agent's trajectories with its slots marked. Images
are PNG embedded as base64 data URIs and the style sheet is inline, so the file opens anywhere
without fetching anything.
"""

from __future__ import annotations

import base64
import html
import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from negotiate.core.files import write_atomic
from negotiate.errors import RunFolderError
from negotiate.output import plots
from negotiate.output.results import PriceRow, RunFiles, load_run
from negotiate.resources import KINDS

__all__ = [
    "CAUTION",
    "MAX_TRAJECTORIES",
    "SpaceTimeLine",
    "order_gap_text",
    "render_report",
    "space_time_lines",
    "write_report",
]

SLOT_ROWS = 30
"""Users per slot chart (a longer queue is split into several charts)."""
MAX_SLOT_CHARTS = 4
"""Slot charts per resource at most."""
MAX_TRAJECTORIES = 24
"""Larger fleets show the trajectories of the agents whose cost rose most (all are in the CSV files)."""

CAUTION = (
    "negotiate is a planning and research tool, not a safety controller. Gaps, headways, speed limits and "
    "site rules must come from local codes and licensed practice; check every schedule against the rules of "
    "your site before anything moves."
)

_CSS = """
body { font-family: system-ui, -apple-system, "Segoe UI", Roboto, "DejaVu Sans", sans-serif; color: #222;
       background: #fff; margin: 0; line-height: 1.45; }
main { max-width: 940px; margin: 0 auto; padding: 24px 20px 48px; }
h1 { font-size: 1.55em; margin: 0 0 4px; }
h2 { font-size: 1.2em; margin: 34px 0 8px; padding-bottom: 3px; border-bottom: 2px solid #0072B2; }
h3 { font-size: 1.0em; margin: 18px 0 6px; }
p.desc { margin: 0 0 4px; font-size: 1.05em; }
p.sub { color: #555; margin: 0 0 14px; }
p.note { color: #555; font-size: 0.9em; margin: 6px 0 10px; }
div.caution { border-left: 5px solid #E69F00; background: #FFF8E8; padding: 8px 12px; margin: 12px 0 18px; }
table { border-collapse: collapse; margin: 6px 0 10px; font-size: 0.88em; }
th, td { padding: 4px 8px; border-bottom: 1px solid #DDD; text-align: left; vertical-align: top; }
th { background: #F2F5F8; font-weight: 600; border-bottom: 1px solid #AAB; }
th small, small.share { white-space: nowrap; }
td:first-child { white-space: nowrap; }
td.n { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
th.n { text-align: right; }
table.kv th { background: none; border-bottom: 1px solid #EEE; font-weight: 600; width: 15em; }
tr.bad td { background: #FBEAE5; }
span.verdict-smooth { color: #006B4F; }
span.verdict-nonsmooth { color: #A34400; font-weight: 600; }
img { max-width: 100%; height: auto; display: block; margin: 6px 0 14px; }
nav a { margin-right: 14px; color: #0072B2; }
div.beside { display: flex; gap: 14px; align-items: flex-start; }
div.beside img { max-width: 72%; }
p.order-gap { font-size: 0.9em; border-left: 4px solid #0072B2; padding: 4px 10px; margin: 12px 0; }
code { font-size: 0.92em; }
small.share { color: #666; }
"""


# ---------------------------------------------------------------------------------------------------------
# numbers


def _sig(v: float, digits: int = 3) -> str:
    """``digits`` significant digits, thousands separated by thin spaces; scientific outside 1e-3..1e9."""
    if v is None or not math.isfinite(v):
        return "–"
    if v == 0:
        return "0"
    a = abs(v)
    if a < 1e-3 or a >= 1e9:
        return f"{v:.{digits - 1}e}"
    decimals = digits - 1 - math.floor(math.log10(a))
    r = round(v, decimals)
    return f"{r:,.{max(0, decimals)}f}".replace(",", "\u2009")


def _cost(v: float) -> str:
    """A cost: whole units with separators when large, else four significant digits."""
    if v is None or not math.isfinite(v):
        return "–"
    if abs(v) >= 1000:
        return f"{v:,.0f}".replace(",", "\u2009")
    return _sig(v, 4)


def _time(v: float) -> str:
    return "–" if not math.isfinite(v) else f"{v:,.1f}".replace(",", "\u2009")


def _whole(v: float) -> str:
    """A time in s without decimals when it is whole (block starts), else one decimal."""
    if math.isfinite(v) and v == round(v):
        return f"{v:,.0f}".replace(",", "\u2009")
    return _time(v)


def _pct(v: float) -> str:
    if v is None or not math.isfinite(v):
        return "–"
    return ("+" if v > 0 else "") + _sig(100 * v, 2) + " %"


# ---------------------------------------------------------------------------------------------------------
# html pieces


def _e(s: object) -> str:
    return html.escape(str(s), quote=True)


def _img(png: bytes, alt: str) -> str:
    data = base64.b64encode(png).decode("ascii")
    return f'<img src="data:image/png;base64,{data}" alt="{_e(alt)}">'


def _table(header: Sequence[tuple[str, bool]], rows: Iterable[Sequence[str]], ident: str,
           row_classes: Sequence[str] | None = None) -> str:  # fmt: skip
    """``header``: (label, numeric); cells are already-escaped HTML."""
    head = "".join(f'<th class="n">{h}</th>' if num else f"<th>{h}</th>" for h, num in header)
    body = []
    for i, r in enumerate(rows):
        rc = f' class="{row_classes[i]}"' if row_classes and row_classes[i] else ""
        cells = "".join(
            f'<td class="n">{c}</td>' if num else f"<td>{c}</td>" for c, (_h, num) in zip(r, header, strict=True)
        )
        body.append(f"<tr{rc}>{cells}</tr>")
    return f'<table id="{_e(ident)}"><thead><tr>{head}</tr></thead><tbody>{"".join(body)}</tbody></table>'


def _verdict(v: str) -> str:
    return f'<span class="verdict-{_e(v)}">{_e(v)}</span>' if v else "–"


def _short_list(items: Sequence[str], n: int = 3) -> str:
    if not items:
        return "none"
    shown = ", ".join(_e(x) for x in items[:n])
    return shown + (f" and {len(items) - n} more" if len(items) > n else "")


# ---------------------------------------------------------------------------------------------------------
# sections


def _infeasible(n: object) -> str:
    return f" ({n} admitted no schedule and were skipped)" if isinstance(n, int) and n > 0 else ""


def _phases(p: object) -> str:
    """``" (build 1.2 s, ...)"`` from run.json's ``phase_times_s``; empty when absent or not numbers."""
    if not isinstance(p, dict) or not p or not all(isinstance(v, int | float) for v in p.values()):
        return ""
    return " (" + ", ".join(f"{_e(str(k).replace('_', ' '))} {_sig(float(v), 2)} s" for k, v in p.items()) + ")"


def _summary(f: RunFiles) -> str:
    s = f.summary
    st = s.get("settings", {})
    rows = [
        ("status", f"{_e(s.get('status'))} ({_e(s.get('message', ''))})"),
        ("method", f"{_e(st.get('method', ''))}; orders by {_e(st.get('order', ''))}; "
                   f"tolerance {_e(st.get('tolerance', ''))}; at most {_e(st.get('max_rounds', ''))} rounds"),
        ("rounds", _e(s.get("rounds"))),
        ("agent solves", f"{_e(s.get('agent_solves'))} (guard probes included)"),
        ("orders tried", _e(s.get("order_trials")) + _infeasible(s.get("order_trials_infeasible"))),
        ("wall time", f"{_sig(s.get('wall_time_s', float('nan')), 2)} s" + _phases(s.get("phase_times_s"))),
        ("total cost (weighted)", _cost(_f(s.get("total_cost")))),
        ("total at free optima", f"{_cost(_f(s.get('free_total_cost')))} (each agent alone: a lower bound)"),
        ("cost of coordination", _cost(_f(s.get("total_cost")) - _f(s.get("free_total_cost")))),
    ]  # fmt: skip
    if "centralized_cost" in s:
        gap = s.get("relative_gap")
        rows += [
            ("centralized optimum", f"{_cost(_f(s.get('centralized_cost')))} ({_e(s.get('centralized_status'))}, "
                                    f"{_sig(_f(s.get('centralized_wall_time_s')), 2)} s)"),
            ("relative gap to it", "–" if gap is None else f"{gap:+.2e}"),
        ]  # fmt: skip
    else:
        rows.append(("centralized optimum", "not computed (run with --verify)"))
    if "order_gap_kind" in s:
        reason = s.get("order_gap_reason") or ""
        rows.append(("order gap", f"{_e(s.get('order_gap_kind'))}: best order's total ≥ "
                                  f"{_cost(_f(s.get('order_bound')))}, gap {_cost(_f(s.get('order_gap')))}"
                                  + (f" ({_e(reason)})" if reason else "")))  # fmt: skip
    for res, order in (s.get("orders") or {}).items():
        shown = " → ".join(_e(a) for a in order[:12])
        if len(order) > 12:
            shown += f" → … ({len(order)} users in all; the full order is in run.json)"
        rows.append((f"order on {_e(res)}", shown))
    body = "".join(f"<tr><th>{k}</th><td>{v}</td></tr>" for k, v in rows)
    return f'<h2 id="summary">Run summary</h2><table id="summary-table" class="kv"><tbody>{body}</tbody></table>'


def _f(v: object) -> float:
    return float("nan") if v is None else float(v)  # type: ignore[arg-type]


@dataclass(frozen=True)
class SpaceTimeLine:
    """One vehicle's trajectory near an exclusive zone, as drawn in the time-space diagram.

    ``time_s`` and ``distance_m`` are the trajectory's nodes, the distance being the position along the
    vehicle's own route minus ``entry_m``, its position at the slot's ``enter`` time (s): every route meets
    the zone at distance 0. ``clear_m`` is the distance at the slot's ``leave`` time (s), where the vehicle
    has cleared the zone (for a front position: the zone's length plus the vehicle's).
    """

    agent: str
    time_s: np.ndarray
    distance_m: np.ndarray
    enter: float
    leave: float
    entry_m: float
    clear_m: float


def space_time_lines(files: RunFiles, resource: str) -> list[SpaceTimeLine]:
    """The lines of the time-space diagram of ``resource``, in order of entry; empty without vehicle users.

    Built from the run folder alone: the slot times from ``schedule.csv``, the positions from each user's
    ``trajectories/<agent>.csv`` (columns ``time_s`` and ``position_m``), linearly interpolated at the slot's
    entry and exit times. Users without a position column (machines, chargers) or without a trajectory file
    are left out, as is a trajectory whose times do not increase.
    """
    out = []
    for s in sorted((s for s in files.schedule if s.resource == resource and s.chart == "slots"),
                    key=lambda s: s.enter):  # fmt: skip
        series = files.trajectories.get(s.agent) or {}
        if "time_s" not in series or "position_m" not in series:
            continue
        t = np.asarray(series["time_s"], dtype=float)
        x = np.asarray(series["position_m"], dtype=float)
        ok = np.isfinite(t) & np.isfinite(x)
        t, x = t[ok], x[ok]
        if t.size < 2 or np.any(np.diff(t) <= 0) or not t[0] <= s.enter <= s.leave <= t[-1]:
            continue
        entry = float(np.interp(s.enter, t, x))
        clear = float(np.interp(s.leave, t, x)) - entry
        out.append(SpaceTimeLine(s.agent, t, x - entry, s.enter, s.leave, entry, clear))
    return out


def order_gap_text(summary: Mapping[str, object]) -> str:
    """The order's gap in plain words, as the report shows it beside each time-space diagram.

    From run.json's keys (``total_cost``, ``order_bound``, ``order_gap``, ``order_gap_kind``,
    ``order_gap_reason``; cost units): the bound on the best order's total, the gap of this schedule's total
    to it, absolute and relative to ``max(1, |total|)``, and whether it is ``certified`` or ``heuristic`` and
    why. A run whose order rule computes no bound says so.
    """
    kind = summary.get("order_gap_kind")
    if kind not in ("certified", "heuristic"):
        settings = summary.get("settings")
        rule = settings.get("order", "") if isinstance(settings, dict) else ""
        return (f"Order gap: not computed (orders by {rule}); the order master (order = \"master\") bounds the "
                "best order's total from below.")  # fmt: skip
    total, bound, gap = _f(summary.get("total_cost")), _f(summary.get("order_bound")), _f(summary.get("order_gap"))
    rel = gap / max(1.0, abs(total)) if math.isfinite(gap) and math.isfinite(total) else math.nan
    reason = str(summary.get("order_gap_reason") or "")
    text = (f"Order gap ({kind}): no order's total is below {_cost(bound)}; this schedule's total {_cost(total)} is "
            f"{_cost(gap)} above that bound ({'–' if not math.isfinite(rel) else f'{100 * rel:.2g} %'}).")  # fmt: skip
    if kind == "certified":
        text += " Certified: every agent's value cuts passed the convexity checks, so the bound holds for every order"
        text += f" ({reason})." if reason else "."
    else:
        text += f" Heuristic: {reason or 'the bound is not finite'}."
    return text


def _space_time(f: RunFiles, resource: str, gap: float, users: int) -> str:
    """The time-space diagram of one exclusive resource and its note; empty without vehicle users."""
    lines = space_time_lines(f, resource)
    if not lines:
        return ""
    fig = plots.space_time_chart(resource, lines, gap)
    left = users - len(lines)
    note = ("Time-space diagram: each vehicle's position along its own route, measured from where it enters "
            f"{_e(resource)} (0 m), against time; the line's number is its place in the order of entry. The "
            "band is the zone from entry until the vehicle has cleared it, read from the trajectories at the slot's "
            "entry and exit times.")  # fmt: skip
    if left:
        note += f" Not drawn: {left} user{'s' * (left != 1)} without a position along a route."
    return (f'<div class="beside">{_img(plots.png(fig), f"time-space diagram of {resource}")}'
            f'<p class="order-gap">{_e(order_gap_text(f.summary))}</p></div><p class="note">{note}</p>')


def _schedule(f: RunFiles) -> str:
    out = ['<h2 id="schedule">Schedule</h2>']
    free: dict[str, dict[str, list[float]]] = {}
    for p in f.prices:
        if p.kind in ("enter", "leave"):
            pair = free.setdefault(p.resource, {}).setdefault(p.agent, [math.nan, math.nan])
            pair[0 if p.kind == "enter" else 1] = p.free_optimum
    for r in f.exclusive():
        slots = [s for s in f.schedule if s.resource == r.resource and s.chart == "slots"]
        if not slots:
            continue
        fr = {a: (v[0], v[1]) for a, v in free.get(r.resource, {}).items() if all(map(math.isfinite, v))}
        gap = r.gap_s if math.isfinite(r.gap_s) else 0.0
        out.append(f"<h3>{_e(r.resource)} ({_e(KINDS[r.kind].report_title([r]))}, {len(slots)} users)</h3>")
        slots.sort(key=lambda s: s.enter)
        # a long queue in one chart would shrink every slot and gap to a dot: a chart per group of users
        groups = [slots[i : i + SLOT_ROWS] for i in range(0, len(slots), SLOT_ROWS)]
        for g, part in enumerate(groups[:MAX_SLOT_CHARTS]):
            title = None if len(groups) == 1 else f"users {g * SLOT_ROWS + 1}–{g * SLOT_ROWS + len(part)}"
            fig = plots.slot_chart(r.resource, part, gap, fr, part=title)
            out.append(_img(plots.png(fig), f"slots on {r.resource}" + (f", {title}" if title else "")))
        if len(groups) > MAX_SLOT_CHARTS:
            out.append(f'<p class="note">The first {MAX_SLOT_CHARTS * SLOT_ROWS} of {len(slots)} users are drawn; '
                       "every slot is in the price table and in prices.csv.</p>")  # fmt: skip
        out.append(_space_time(f, r.resource, gap, len(slots)))
    for name in f.capacity_names():
        blocks = [b for b in f.resources if b.resource == name]
        shares = [s for s in f.schedule if s.resource == name and s.chart == "shares"]
        unit = blocks[0].unit
        fig = plots.capacity_chart(name, unit, blocks, shares)
        out.append(f"<h3>{_e(name)} ({_e(KINDS[blocks[0].kind].report_title(blocks))})</h3>")
        out.append(_img(plots.png(fig), f"shares of {name}"))
        if any(math.isfinite(s.draw) for s in shares):
            out.append(_draw_note())
    return "".join(out)


def _draw_note() -> str:
    """What the share chart's solid and hatched parts mean."""
    return ('<p class="note">A share is what an agent may draw in a block; the solid part of its bar is what it '
            "plans to draw there (<code>draw</code> in schedule.csv), the hatched part what it leaves unused.</p>")


def _agents(f: RunFiles) -> str:
    rows, classes = [], []
    for a in f.agents:
        rel = a.increase / abs(a.free_value) if a.free_value else math.nan
        rows.append([
            _e(a.agent), _e(a.model), _sig(a.weight, 3), _e(a.status), _cost(a.free_value), _cost(a.value),
            _cost(a.increase), _pct(rel), _verdict(a.verdict), _short_list(a.weakly_active),
        ])  # fmt: skip
        classes.append("" if a.status == "converged" else "bad")
    table = _table(
        [("agent", False), ("model", False), ("weight", True), ("solve", False), ("cost alone", True),
         ("cost coordinated", True), ("increase", True), ("increase rel.", True), ("certificate", False),
         ("weakly active", False)],
        rows, "agents-table", row_classes=classes,
    )  # fmt: skip
    note = (
        '<p class="note">Costs are each agent\'s own optimal value, unweighted (the fleet total weighs them). '
        "<i>cost alone</i> is the value at the agent's free optimum. Certificate: <i>smooth</i> means the value "
        "gradient and the solution are differentiable; <i>value-differentiable</i> means the value is but the "
        "solution map is not; <i>nonsmooth</i> means the value may have a kink there (a weakly active "
        "constraint), so a price is one of several one-sided slopes.</p>"
    )
    return f'<h2 id="agents">Agents</h2>{table}{note}'


def _prices(f: RunFiles) -> str:
    out = ['<h2 id="prices">Prices (value gradients)</h2>']
    slot: dict[tuple[str, str], dict[str, float]] = {}
    for p in f.prices:
        if p.kind in ("enter", "leave"):
            d = slot.setdefault((p.agent, p.resource), {})
            d[p.kind] = p.value
            d["d_" + p.kind] = p.price
    if slot:
        rows = [[_e(a), _e(r), _time(d.get("enter", math.nan)), _time(d.get("leave", math.nan)),
                 _sig(d.get("d_enter", math.nan)), _sig(d.get("d_leave", math.nan))]
                for (a, r), d in sorted(slot.items(), key=lambda kv: (kv[0][1], kv[1].get("enter", 0.0)))]  # fmt: skip
        header = [("agent", False), ("resource", False), ("enter (s)", True), ("leave (s)", True),
                  ("dV/d(enter) (cost/s)", True), ("dV/d(leave) (cost/s)", True)]  # fmt: skip
        out.append(_table(header, rows, "slot-prices"))
    cap = [p for p in f.prices if p.kind == "share"]
    for name in dict.fromkeys(p.resource for p in cap):
        these = [p for p in cap if p.resource == name]
        blocks = sorted({p.block for p in these if p.block is not None})
        unit = these[0].unit
        agents = list(dict.fromkeys(p.agent for p in these))
        cell = {(p.agent, p.block): p for p in these}
        rows = [[_e(a)] + [_price_cell(cell.get((a, b))) for b in blocks] for a in agents]
        start = {b.block: b.start_s for b in f.resources if b.resource == name}
        header = [("agent", False)] + [(f"block {b}<br><small>from {_whole(start.get(b, math.nan))} s</small>", True)
                                       for b in blocks]  # fmt: skip
        out.append(f"<h3>{_e(name)}: dV/d(share) per block (cost/{_e(unit)})</h3>")
        out.append(_table(header, rows, f"prices-{name}"))
    note = [
        "A price is the agent's value gradient at the coordinated point: moving the parameter by d changes the "
        "agent's cost by about price &times; d."
    ]
    if slot:
        note.append("A negative dV/d(enter) means the agent would gain from entering later; a positive "
                    "dV/d(leave) means it would pay for leaving later.")  # fmt: skip
    if cap:
        note.append("A negative dV/d(share) is what one more unit of share would save the agent; 0 means the "
                    "share is not what limits it.")  # fmt: skip
    note.append("Exact values: prices.csv.")
    out.append(f'<p class="note">{" ".join(note)}</p>')
    return "".join(out)


def _si(v: float, unit: str) -> str:
    """Three significant digits with an SI prefix for large values (93.0 kW, 1.20 MW)."""
    if not math.isfinite(v):
        return "–"
    for scale, prefix in ((1e9, "G"), (1e6, "M"), (1e3, "k")):
        if abs(v) >= scale:
            return f"{_sig(v / scale)} {prefix}{unit}"
    return f"{_sig(v)} {unit}"


def _price_cell(p: PriceRow | None) -> str:
    """A capacity price with the share it was given, small, below it."""
    if p is None:
        return "–"
    return f'{_sig(p.price)}<br><small class="share">share {_e(_si(p.value, p.unit))}</small>'


def _convergence(f: RunFiles) -> str:
    if not f.history:
        return ""
    fig = plots.convergence_chart(f.history)
    last = f.history[-1]
    note = (f'<p class="note">{len(f.history)} rounds recorded; last note: '
            f"{_e(last.note) or '–'}. Round 0 is the starting point (free optima projected onto the "
            "feasible set).</p>")  # fmt: skip
    return f'<h2 id="convergence">Convergence</h2>{_img(plots.png(fig), "convergence history")}{note}'


def _trajectories(f: RunFiles) -> str:
    marks = []
    if any(s.chart == "slots" for s in f.schedule):
        marks.append("shaded bands are its slots")
    if any(s.chart == "shares" for s in f.schedule):
        marks.append("a wide light red line its allocated capacity share")
    text = "Each agent's planned trajectory at the coordinated parameters; " + ", ".join(marks) + "."
    out = ['<h2 id="trajectories">Trajectories</h2>', f'<p class="note">{text}</p>']
    missing = []
    shown = f.agents
    if len(shown) > MAX_TRAJECTORIES:
        shown = tuple(sorted(shown, key=lambda a: -a.increase if math.isfinite(a.increase) else 0.0)
                      [:MAX_TRAJECTORIES])  # fmt: skip
        out.append(f'<p class="note">{len(f.agents)} agents: shown are the {MAX_TRAJECTORIES} whose cost rose '
                   "most with coordination; every agent's trajectory is in trajectories/.</p>")  # fmt: skip
    for a in shown:
        series = f.trajectories.get(a.agent)
        if not series or "time_s" not in series or len(series) < 2 or not series["time_s"].size:
            missing.append(a.agent)
            continue
        slots = [s for s in f.schedule if s.agent == a.agent]
        series = {c: np.where(np.isfinite(v), v, np.nan) for c, v in series.items()}  # gaps, not infinite axes
        fig = plots.trajectory_chart(a.agent, series, slots)
        out.append(_img(plots.png(fig), f"trajectories of {a.agent}"))
    if missing:
        out.append(f'<p class="note">No trajectory for: {", ".join(_e(m) for m in missing)} '
                   "(no trajectory function, or the final solve failed).</p>")  # fmt: skip
    return "".join(out)


def render_report(files: RunFiles) -> str:
    """The report of a run folder as one HTML string (see the module docstring)."""
    s = files.summary
    title = f"negotiate run report: {s.get('fleet', '')}"
    n_agents = len(files.agents)
    n_res = len({r.resource for r in files.resources})
    counts = f"{n_agents} agent{'s' * (n_agents != 1)}, {n_res} resource{'s' * (n_res != 1)}"
    nav = "".join(f'<a href="#{k}">{v}</a>' for k, v in (("summary", "summary"), ("schedule", "schedule"),
                  ("agents", "agents"), ("prices", "prices"), ("convergence", "convergence"),
                  ("trajectories", "trajectories")))  # fmt: skip
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>{_e(title)}</title><style>{_CSS}</style></head><body><main>",
        f"<h1>{_e(title)}</h1>",
        f'<p class="desc">{_e(s["description"])}</p>' if s.get("description") else "",
        f'<p class="sub">{counts}; fleet file <code>{_e(s.get("source", ""))}</code>. '
        "Units are SI (s, W, kg, m); costs are in each agent's own cost unit.</p>",
        f'<div class="caution"><b>Caution.</b> {_e(CAUTION)}</div>',
        f"<nav>{nav}</nav>",
        _summary(files),
        _schedule(files),
        _agents(files),
        _prices(files),
        _convergence(files),
        _trajectories(files),
        "</main></body></html>",
    ]
    return "\n".join(parts) + "\n"


def write_report(folder: str | Path, out: str | Path | None = None) -> Path:
    """Read the run folder and write its report (``folder/report.html`` unless ``out`` is given).

    Only files inside ``folder`` are read. The report goes to a new temporary file beside it, then is
    renamed over the old one: a link placed at ``report.html`` or at a temporary name is replaced, never
    followed, so the write stays in the folder.

    Raises
    ------
    RunFolderError
        The folder or one of its files is missing or damaged, or the report cannot be written there (the
        message names the file and what to do).
    """
    files = load_run(folder)
    path = Path(out) if out is not None else Path(folder) / "report.html"
    html = render_report(files)
    try:
        return write_atomic(path, html)
    except OSError as exc:
        raise RunFolderError(
            f"{path}: cannot write the report ({exc.strerror or exc}); make the folder writable, or remove what "
            "is in the way, and run 'negotiate report' again"
        ) from None
