"""Rich tables for the terminal: what scan found, what swap did.

Titles and cells are :class:`rich.text.Text`, so names and paths taken from the
model or the command line (``[/b]model.onnx``, a node called ``[red]``) are shown
as written, never read as console markup.
"""
from __future__ import annotations

from rich.table import Table
from rich.text import Text

from swapper.plan.plan import Plan
from swapper.scan.sites import Site


def sites_table(sites: list[Site], title: str) -> Table:
    table = Table(title=Text(title), title_justify="left")
    for col in ("id", "function", "form", "role", "channels", "shape", "producer → consumers", "cost share"):
        table.add_column(col, justify="right" if col in ("channels", "cost share") else "left")
    for s in sites:
        shape = "×".join("?" if d in (None, "") or isinstance(d, str) else str(d) for d in (s.shape or ()))
        flow = f"{s.producer or 'input'} → {', '.join(s.consumers) or '-'}"
        role = s.role if s.supported else f"{s.role}; not swappable: {s.reason}"
        if s.body and s.supported:  # where a body site sits (an unswappable one's reason names its body)
            role += " in " + " / ".join(f"{node}.{attribute}" for node, attribute in s.body)
        cells = (s.id, s.function, s.form, role, "-" if s.channels is None else str(s.channels),
                 shape or "?", flow, "?" if s.cost_share is None else f"{100 * s.cost_share:.1f}%")
        table.add_row(*(Text(str(c)) for c in cells))
    return table


def swap_table(rows: list[dict]) -> Table:
    """The per-site summaries of :func:`swapper.report.build.site_rows` as a terminal table."""
    table = Table(title="swapped sites", title_justify="left")
    for col in ("site", "function → surrogate", "a", "b", "c", "d", "nodes added", "mse start", "mse fitted",
                "refit (held-out mse)"):
        table.add_column(col)
    for r in rows:
        cells = (
            r["site_id"],
            f"{r['source']} → {r['target']}" + (f" ({r['form']})" if r.get("form") else ""),
            *(r["placement"].get(p, "-") for p in "abcd"),
            "-" if r["nodes_added"] is None else str(r["nodes_added"]),
            "-" if r["mse_start"] is None else f"{r['mse_start']:.3g}",
            "-" if r["mse_fit"] is None else f"{r['mse_fit']:.3g}",
            _refit_cell(r.get("refit")),
        )
        table.add_row(*(Text(str(c)) for c in cells))
    return table


def skipped_lines(plan: Plan) -> list[str]:
    return [f"left {s.site_id} ({s.function}): {s.reason}" for s in plan.skipped]


def _refit_cell(refit: dict | None) -> str:
    """"yes 0.26 → 0.15" / "no 0.12 → 0.13": the site's consumer refit and its held-out figures."""
    if not refit:
        return "-"
    word = "yes" if refit["refitted"] else "no"
    if refit.get("mse_current") is None:
        return word
    return f"{word} {refit['mse_current']:.3g} → {refit['mse_refit']:.3g}"


def target_lines(plan: Plan) -> list[str]:
    """What the plan says about its target: the opset conversion, ops that remain, faster forms out of reach."""
    lines = []
    if plan.conversion:
        c = plan.conversion
        lines.append(f"converted opset {c['from']} → {c['to']} (max |Δ| {c['max_abs_diff']:.3g} on "
                     f"{c['samples']} samples)")
    lines += [f"remains: {r}" for r in plan.remaining]
    lines += [f"hint: {h}" for h in plan.hints]
    return lines


def unrun_lines(calibration) -> list[str]:
    """A warning naming the swapped body sites no calibration batch ran (an If branch the data never takes)."""
    idle = [c.site_id for c in (calibration.sites if calibration is not None else [])
            if any("did not run on any calibration batch" in n for n in c.notes)]
    if not idle:
        return []
    line = (f"warning: {', '.join(idle)} sit in a body no calibration batch ran: they keep their starting "
            "parameters, and validation data like it does not run them either")
    return [line]
