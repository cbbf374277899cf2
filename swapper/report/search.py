"""The sweep and the automatic plan for people: a terminal table, the Pareto plot, the report's section.

Transformation: the ``swapper.sweep/1`` payload (:mod:`swapper.sweep.schema`)
and the report's ``search`` entry (:func:`search_entry`) -> a rich table, a PNG
of accuracy cost against saving with the Pareto front marked (matplotlib, the
``plots`` extra; None without it) and an HTML section.
"""
from __future__ import annotations

import base64
import html
import io
import logging

from rich.table import Table

logger = logging.getLogger(__name__)


def _num(x, fmt: str = ".3g") -> str:
    return "-" if x is None else format(x, fmt)


def saving_label(payload: dict) -> str:
    return "saving (ms, pooled)" if payload["target"]["costs_from"] == "measured" else "saving (cost units)"


def sweep_table(payload: dict, chosen: set[str] = frozenset()) -> Table:
    """One row per candidate: metric cost (with its interval), saving, status; the front and choices marked."""
    metric = payload["metric"]
    table = Table(title=f"sweep: {payload['run']['candidates']} candidates, cost in {metric['unit']} "
                        f"({metric['name']}), target {payload['target']['name']}", title_justify="left")
    for col in ("candidate", "cost", "95% interval", "saving ms", "fraction", saving_label(payload), "status"):
        table.add_column(col)
    front = set(payload["pareto"])
    for site in payload["sites"]:
        for c in site["candidates"]:
            m, s = c["metric"] or {}, c["saving"]
            iv = m.get("interval")
            mark = ("*" if c["id"] in chosen else "") + ("+" if c["id"] in front else "")
            status = c["status"] if c["status"] == "ok" else f"failed: {c['reason']}"
            table.add_row(c["id"] + (f" {mark}" if mark else ""), _num(m.get("cost")),
                          "-" if not iv else f"[{iv[0]:.3g}, {iv[1]:.3g}]", _num(s["ms"]),
                          "-" if s["fraction"] is None else f"{100 * s['fraction']:.2f}%", _num(s["value"]), status)
    table.caption = "\n".join([
        "candidate: site/surrogate:form/placement policy (exact: nothing added, what cannot fold is fixed; "
        "exact+nodes: that becomes Mul/Add nodes), /refit: the consumers' weights re-fitted",
        f"cost: what the candidate loses swapped alone, in {metric['unit']}, larger = worse (a gain is negative); "
        "fraction: the saving as a share of the original's time (declared target: of the swept sites' cost)",
        "+ on the Pareto front" + (", * chosen" if chosen else "")])
    table.caption_justify = "left"
    return table


def sweep_points(payload: dict) -> list[tuple]:
    """(id, saving value, cost, refit, fold) of every ok candidate of a sweep payload that has both figures."""
    return [(c["id"], c["saving"]["value"], c["metric"]["cost"], c["refit"], c["fold"])
            for site in payload["sites"] for c in site["candidates"]
            if c["status"] == "ok" and c["saving"]["value"] is not None and c["metric"]["cost"] is not None]


def search_points(search: dict) -> list[tuple]:
    """The same points from a report's ``search`` entry."""
    return [(c["id"], c["saving"], c["cost"], c["refit"], c["fold"]) for site in search["sites"]
            for c in site["candidates"] if c["status"] == "ok" and c["saving"] is not None and c["cost"] is not None]


def pareto_png(points: list[tuple], front_ids: list[str], *, unit: str, saving: str, allowance: float | None,
               chosen: set[str] = frozenset()) -> bytes | None:
    """Accuracy cost against saving of every point, the front as a line; None without matplotlib."""
    try:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError:
        return None
    fig, ax = plt.subplots(figsize=(7, 4))
    for k, (fold, marker) in enumerate((("exact", "o"), ("exact+nodes", "s"))):
        for refit in (False, True):
            sel = [p for p in points if p[4] == fold and p[3] == refit]
            if sel:
                ax.scatter([p[1] for p in sel], [p[2] for p in sel], marker=marker, alpha=0.7,
                           color=f"C{2 * k + refit}", label=f"{fold}{' + refit' if refit else ''}")
    by_id = {p[0]: p for p in points}
    front = sorted((by_id[i] for i in front_ids if i in by_id), key=lambda p: p[1])
    if front:
        ax.plot([p[1] for p in front], [p[2] for p in front], "k--", lw=1, label="Pareto front")
    for pid in sorted(chosen):
        if pid in by_id:
            ax.annotate(pid.split("/")[0], (by_id[pid][1], by_id[pid][2]), fontsize=7)
    if allowance is not None:
        ax.axhline(allowance, color="C3", lw=0.8, label="allowance (whole plan)")
    ax.set_xlabel(saving + ", one site swapped alone")
    ax.set_ylabel(f"accuracy cost ({unit})")
    ax.legend(fontsize=7)
    fig.tight_layout()
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=110)
    plt.close(fig)
    return buf.getvalue()


def sweep_png(payload: dict, chosen: set[str] = frozenset()) -> bytes | None:
    """:func:`pareto_png` of a sweep payload."""
    return pareto_png(sweep_points(payload), payload["pareto"], unit=payload["metric"]["unit"],
                      saving=saving_label(payload), allowance=payload["metric"]["allowance"], chosen=chosen)


def search_entry(auto, payload: dict) -> dict:
    """The report.json ``search`` entry of an automatic plan (``swapper.api.AutoResult``)."""
    s = auto.search
    return {
        "target": dict(payload["target"]),
        "metric": dict(payload["metric"]),
        "reason": auto.reason,
        "sites": auto.sites,
        "attempts": [{"chosen": a.chosen, "passed": a.verification.passed, "faster": a.verification.faster,
                      "detail": a.verification.detail, "dropped": a.dropped, "why_dropped": a.why_dropped}
                     for a in s.attempts],
        "first_estimate": None if s.first is None else {"saving": s.first.saving, "cost": s.first.cost,
                                                        "sites": sorted(s.first.chosen)},
        "pareto": list(payload["pareto"]),
        "saving_label": saving_label(payload),
        "sweep_run": dict(payload["run"]),
        "lacking_ops": auto.lacking,
    }


def _e(x) -> str:
    return html.escape(str(x))


def search_html(search: dict | None) -> str:
    """The report's section on the automatic plan, with its Pareto plot ("" when the report has none)."""
    if not search:
        return ""
    chosen = {s["chosen"] for s in search["sites"] if s["chosen"]}
    plot = pareto_png(search_points(search), search["pareto"], unit=search["metric"]["unit"],
                      saving=search["saving_label"], allowance=search["metric"]["allowance"], chosen=chosen)
    t, m = search["target"], search["metric"]
    parts = [f"<h2>Automatic plan</h2><p>{_e(search['reason'])}</p>",
             (f"<p>Target {_e(t['name'])}: {_e(t['how'])}. Accuracy cost in {_e(m['unit'])} ({_e(m['name'])}), "
              f"allowance {_num(m['allowance'])} for the whole plan.</p>")]
    rows = []
    for site in search["sites"]:
        tried = "; ".join(f"{c['id'].split('/', 1)[1]}: cost {_num(c['cost'])}, saving {_num(c['saving'])}"
                          + (" (front)" if c["on_front"] else "") + ("" if c["status"] == "ok" else
                                                                     f" failed: {c['reason']}")
                          for c in site["candidates"])
        rows.append(f"<tr><td>{_e(site['site_id'])}</td><td>{_e(site['chosen'] or 'kept')}</td>"
                    f"<td>{_e(site['why'])}</td><td><small>{_e(tried)}</small></td></tr>")
    parts.append("<table><tr><th>site</th><th>chosen</th><th>why</th><th>candidates tried (alone)</th></tr>"
                 + "".join(rows) + "</table>")
    steps = [f"<li>{_e(', '.join(a['chosen']))}: {'passed' if a['passed'] else 'failed'}"
             f"{'' if a['faster'] is None else (', faster' if a['faster'] else ', not faster')} ({_e(a['detail'])})"
             + (f"; dropped {_e(a['dropped'])}: {_e(a['why_dropped'])}" if a["dropped"] else "") + "</li>"
             for a in search["attempts"]]
    if steps:
        parts.append("<p>Verifications of the combined plan:</p><ol>" + "".join(steps) + "</ol>")
    if search.get("lacking_ops"):
        parts.append(f"<p>Ops the target cannot run, still in the model: {_e(search['lacking_ops'])}</p>")
    if plot:
        uri = "data:image/png;base64," + base64.b64encode(plot).decode()
        parts.append(f"<figure><img alt='Pareto plot' src='{uri}'><figcaption>Accuracy cost against saving of "
                     "each candidate swapped alone; dashed: the Pareto front</figcaption></figure>")
    return "".join(parts)
