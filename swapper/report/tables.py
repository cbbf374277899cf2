"""Rich tables for the terminal: what scan found, what swap did.

Titles and cells are :class:`rich.text.Text`, so names and paths taken from the
model or the command line (``[/b]model.onnx``, a node called ``[red]``) are shown
as written, never read as console markup.
"""
from __future__ import annotations

from rich.table import Table
from rich.text import Text

from swapper.plan.placement import LEGEND
from swapper.plan.plan import Plan
from swapper.scan.sites import Site

SITE_WORDS = (
    "role: hidden = an ordinary activation inside the network (swapped by default); gate = its output multiplies "
    "another tensor (--include-gates); output = its values reach a graph output (--include-outputs)",
    "cost share: the site's part of all sites' cost, elements per sample × the function's cost relative to Relu "
    "(`swapper functions`)",
)


def sites_table(sites: list[Site], title: str) -> Table:
    """What `swapper scan` found, one row per site, its words explained beneath it."""
    table = Table(title=Text(title), title_justify="left", caption=Text("\n".join(SITE_WORDS)),
                  caption_justify="left")
    for col in ("id", "function", "form", "role", "channels", "shape", "producer → consumers", "cost share"):
        table.add_column(col, justify="right" if col in ("channels", "cost share") else "left")
    for s in sites:
        shape = "×".join("?" if d in (None, "") or isinstance(d, str) or d < 0 else str(d) for d in (s.shape or ()))
        flow = f"{s.producer or 'input'} → {', '.join(s.consumers) or '-'}"
        role = s.role if s.supported else f"{s.role}; not swappable: {s.reason}"
        if s.body and s.supported:  # where a body site sits (an unswappable one's reason names its body)
            role += " in " + " / ".join(f"{node}.{attribute}" for node, attribute in s.body)
        cells = (s.id, s.function, s.form, role, "-" if s.channels is None else str(s.channels),
                 shape or "?", flow, "?" if s.cost_share is None else f"{100 * s.cost_share:.1f}%")
        table.add_row(*(Text(str(c)) for c in cells))
    return table


def swap_table(rows: list[dict]) -> Table:
    """The per-site summaries of :func:`swapper.report.build.site_rows` as a terminal table, its words
    explained beneath it (the placement words it uses, the nodes column, the refit column)."""
    legend = ["a, b, c, d of y = a·g(b·x + c) + d live where the table says:"]
    legend += [f"  {line}" for line in placement_legend(rows)]
    legend.append("nodes: the site's nodes in the original → in the swapped model")
    legend.append("refit: whether the consumer refit was kept, and its consumers' MSE on held-out samples "
                  "(current → refitted)")
    table = Table(title="swapped sites", title_justify="left", caption=Text("\n".join(legend)),
                  caption_justify="left")
    for col in ("site", "function → surrogate", "a", "b", "c", "d", "nodes", "mse start", "mse fitted",
                "refit (held-out mse)"):
        table.add_column(col)
    for r in rows:
        nodes = r.get("site_nodes")
        cells = (
            r["site_id"],
            f"{r['function']} → {r['surrogate']}" + (f" ({r['form']})" if r.get("form") else ""),
            *(r["placement"].get(p, "-") for p in "abcd"),
            "-" if not nodes else f"{nodes['original']} → {nodes['written']}",
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
    line = (f"warning: {', '.join(idle)} {'sits' if len(idle) == 1 else 'sit'} in a body no calibration batch ran: they keep their starting "
            "parameters, and validation data like it does not run them either")
    return [line]


def functions_listing() -> tuple[str, Table, list[str]]:
    """`swapper functions`: a header naming the cost unit, one row per function, the words explained.

    "swappable" functions are the costly ones swapper replaces, "surrogates" the ones it writes instead.
    A surrogate is not cheaper everywhere: where its measured CPU cost exceeds a function's, its row
    and that function's row say so, rather than imply it saves time there.
    """
    from swapper import functions
    from swapper.functions.costs import known_functions, load_costs
    from swapper.functions.forms import forms_of

    m = load_costs().get("measured", {})
    shape = "×".join(str(d) for d in m.get("shape", [])) or "?"
    header = (f"cost = time per element relative to Relu (Relu = 1.00): median thread CPU time of the function on "
              f"onnxruntime, one thread, a float32 {shape} tensor ({m.get('cpu', '?')}, onnxruntime "
              f"{m.get('onnxruntime', '?')}, {m.get('date', '?')}; benchmarks/measure_op_costs.py measures it "
              "again). A target profile (--target, `swapper targets`) prices ops its own way.")
    measured = set(known_functions())
    cost = {name: fn.cost for name, fn in functions.REGISTRY.items()}
    swappable = [n for n, fn in functions.REGISTRY.items() if not fn.is_cheap]
    table = Table(title=None)
    for col in ("function", "kind", "cost", "default surrogate", "forms / note"):
        table.add_column(col, justify="right" if col == "cost" else "left")
    for name in sorted(functions.REGISTRY):
        fn = functions.REGISTRY[name]
        shown = f"{cost[name]:.2f}" + ("" if name in measured else " (estimate)")
        if not fn.is_cheap:
            default = functions.DEFAULT_SURROGATE.get(name, "")
            if default and cost[default] >= cost[name]:
                default += f" (costs more here: {cost[default]:.2f})"
            cells = (name, "swappable", shown, default or "-", "")
        else:
            forms = ", ".join(f.name + (f" (opset ≥ {f.min_opset})" if f.min_opset > 11 else "") for f in forms_of(name))
            dearer = sorted(s for s in swappable if cost[name] > cost[s])
            note = f"; costs more here than {', '.join(dearer)}" if dearer else ""
            cells = (name, "surrogate", shown, "", forms + note)
        table.add_row(*(Text(c) for c in cells))
    words = ["swappable: a costly function swapper finds and replaces; surrogate: a function it writes in its "
             "place, y = a·g(b·x + c) + d per channel. A surrogate that costs more here can still pay on a target "
             "that fuses it or lacks the original's ops; a plan for a target takes one only where it is cheaper "
             "there."]
    return header, table, words


def placement_legend(rows: list[dict]) -> list[str]:
    """One line per placement word the rows use (in the order of swapper.plan.placement.LEGEND): what it means."""
    used = {w for r in rows for w in r["placement"].values()}
    return [f"{w}: {text}" for w, text in LEGEND.items() if w in used]
