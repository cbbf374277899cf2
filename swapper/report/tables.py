"""Rich tables for the terminal: what scan found, what swap did."""
from __future__ import annotations

from rich.table import Table

from swapper.plan.plan import Plan
from swapper.scan.sites import Site


def sites_table(sites: list[Site], title: str) -> Table:
    table = Table(title=title, title_justify="left")
    for col in ("id", "function", "form", "role", "channels", "shape", "producer → consumers", "cost share"):
        table.add_column(col, justify="right" if col in ("channels", "cost share") else "left")
    for s in sites:
        shape = "×".join("?" if d in (None, "") or isinstance(d, str) else str(d) for d in (s.shape or ()))
        flow = f"{s.producer or 'input'} → {', '.join(s.consumers) or '-'}"
        role = s.role if s.supported else f"{s.role}; not swappable: {s.reason}"
        table.add_row(s.id, s.function, s.form, role, "-" if s.channels is None else str(s.channels),
                      shape or "?", flow, "?" if s.cost_share is None else f"{100 * s.cost_share:.1f}%")
    return table


def swap_table(rows: list[dict]) -> Table:
    """The per-site summaries of :func:`swapper.report.build.site_rows` as a terminal table."""
    table = Table(title="swapped sites", title_justify="left")
    for col in ("site", "function → surrogate", "a", "b", "c", "d", "nodes added", "mse start", "mse fitted",
                "refit (held-out mse)"):
        table.add_column(col)
    for r in rows:
        table.add_row(
            r["site_id"],
            f"{r['source']} → {r['target']}",
            *(r["placement"].get(p, "-") for p in "abcd"),
            "-" if r["nodes_added"] is None else str(r["nodes_added"]),
            "-" if r["mse_start"] is None else f"{r['mse_start']:.3g}",
            "-" if r["mse_fit"] is None else f"{r['mse_fit']:.3g}",
            _refit_cell(r.get("refit")),
        )
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
