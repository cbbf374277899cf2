"""report.html: a self-contained page rendered from the report.json payload."""
from __future__ import annotations

import base64
import html
import io
import json
import logging

import numpy as np

from swapper import functions
from swapper.report.numbers import num, pct, signed
from swapper.report.search import search_html
from swapper.report.tables import placement_legend

logger = logging.getLogger(__name__)

_CSS = """
body{font-family:system-ui,sans-serif;margin:2rem auto;max-width:64rem;color:#1d2433;line-height:1.4}
h1{font-size:1.5rem} h2{font-size:1.15rem;margin-top:2rem;border-bottom:1px solid #d6dbe4}
.verdict{padding:1rem 1.25rem;border-radius:.5rem;font-size:1.1rem}
.ok{background:#e7f5ec;border:1px solid #7cc49a} .no{background:#fbeaea;border:1px solid #d98c8c}
.none{background:#eef1f6;border:1px solid #b8c0cc}
table{border-collapse:collapse;margin:.5rem 0;font-size:.9rem} td,th{padding:.25rem .6rem;border-bottom:1px solid #e3e7ee;text-align:left}
td.n{text-align:right;font-variant-numeric:tabular-nums} .side{display:flex;gap:2rem;flex-wrap:wrap}
.side>div{flex:1 1 22rem;min-width:0}
.caution{margin:.5rem 0 0;padding:.6rem 1rem;border-left:4px solid #c9a227;background:#fdf8e6}
.foot{margin-top:2rem;font-size:.85rem;color:#5b6475} img{max-width:100%}
"""


def _e(x) -> str:
    return html.escape(str(x))


def _table(header: list[str], rows: list[list], numeric: set[int] = frozenset()) -> str:
    head = "".join(f"<th>{_e(h)}</th>" for h in header)
    body = "".join(
        "<tr>" + "".join(f"<td class='n'>{_e(v)}</td>" if i in numeric else f"<td>{_e(v)}</td>"
                         for i, v in enumerate(r)) + "</tr>" for r in rows)
    return f"<table><tr>{head}</tr>{body}</table>"


_ROLES = (("original", "original model"), ("candidate", "candidate model"), ("calibration", "calibration set"),
          ("validation", "validation set"))


def _judged(payload: dict) -> str:
    """What was judged: every input file with its sha256, then the settings the run was given."""
    rows = []
    for key, role in _ROLES:
        entry = payload["inputs"].get(key)
        if entry is None:
            if key == "candidate" and payload["verdict"] is not None:
                rows.append([role, "not written", "", ""])
            continue
        rows.append([role, entry["path"], entry["sha256"], entry["bytes"]])
    files = _table(["", "path", "sha256", "bytes"], rows, numeric={3})
    settings = []
    options = payload.get("options") or {}
    for group in ("swap", "gate", "run"):  # what to swap, how it is judged, how the command ran
        for name, value in sorted((options.get(group) or {}).items()):
            if value is not None and value != []:
                settings.append([group, name, value if isinstance(value, str) else json.dumps(value)])
    return ("<h2>What was judged</h2>" + files
            + ("<p>Settings (unset ones left out):</p>" + _table(["", "setting", "value"], settings) if settings else ""))


def _changed(c: dict) -> str:
    """The validation samples whose top-1 class changed, by index: the pairs behind McNemar's test."""
    ch = c.get("changed")
    if not ch:
        return ""
    if not ch["count"]:
        return "<h2>Samples that changed class</h2><p>No validation sample changed its top-1 class.</p>"
    text = f"{ch['count']} of {c['n']} validation samples changed their top-1 class"
    if ch["discordant"] is not None:
        text += (f"; {ch['discordant']} of them went from right to wrong or back, the discordant pairs McNemar's "
                 f"test counts ({c['n10']} now wrong, {c['n01']} now right); the rest were wrong both times")
    text += "." + (f" The first {ch['shown']} by sample index:" if ch["shown"] < ch["count"] else "")

    def effect(r: dict) -> str:
        if r["label"] is None:
            return ""
        return {(True, False): "now wrong", (False, True): "now right"}.get(
            (r["original"] == r["label"], r["candidate"] == r["label"]), "wrong both times")

    rows = [[r["index"], "–" if r["label"] is None else r["label"], r["original"], r["candidate"], effect(r)]
            for r in ch["samples"]]
    return (f"<h2>Samples that changed class</h2><p>{_e(text)}</p>"
            + _table(["sample index", "label", "original class", "candidate class", ""], rows, numeric={0, 1, 2, 3}))


def _plots(payload: dict) -> list[tuple[str, str]]:
    """(caption, data-URI PNG) pairs; empty when matplotlib is missing."""
    try:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError:
        return []
    out = []
    sites = [s for s in payload["sites"] if s["mse_fit"] is not None]
    if sites:
        fig, ax = plt.subplots(figsize=(7, 3))
        idx = np.arange(len(sites))
        ax.bar(idx - 0.2, [s["mse_start"] for s in sites], 0.4, label="starting parameters")
        ax.bar(idx + 0.2, [s["mse_fit"] for s in sites], 0.4, label="calibrated")
        ax.set_xticks(idx, [s["site_id"] for s in sites])
        ax.set_yscale("log")
        ax.set_ylabel("site output MSE")
        ax.legend()
        out.append(("Per-site error on the calibration data, before and after fitting", _png(fig, plt)))
    plan = payload.get("plan") or {"swaps": []}
    ranges = {c["site_id"]: c for c in (payload.get("calibration") or {}).get("sites", [])}
    worst = sorted(sites, key=lambda s: -s["mse_fit"])[:3]
    for s in worst:
        swap = next(w for w in plan["swaps"] if w["site_id"] == s["site_id"])
        rng = ranges.get(s["site_id"], {})
        f, g = functions.get(swap["function"]), functions.get(swap["surrogate"])
        fig, ax = plt.subplots(figsize=(7, 3))
        for ch in range(min(4, len(swap["a"]))):
            lo = (rng.get("x_min") or [-6.0] * len(swap["a"]))[ch]
            hi = (rng.get("x_max") or [6.0] * len(swap["a"]))[ch]
            x = np.linspace(lo, hi, 200) if hi > lo else np.linspace(lo - 1, lo + 1, 200)
            line, = ax.plot(x, f.ref(x, **swap["function_params"]), lw=2, alpha=0.5)
            ax.plot(x, swap["a"][ch] * g.ref(swap["b"][ch] * x + swap["c"][ch], **swap["surrogate_params"])
                    + swap["d"][ch], "--", color=line.get_color(), label=f"channel {ch}")
        ax.set_xlabel("site input (recorded range)")
        ax.legend(fontsize=7)
        out.append((f"{s['site_id']}: {swap['function']} (solid) vs fitted {swap['surrogate']} (dashed)", _png(fig, plt)))
    return out


def _png(fig, plt) -> str:
    buf = io.BytesIO()
    fig.tight_layout()
    fig.savefig(buf, format="png", dpi=90, metadata={"Software": None})
    plt.close(fig)
    return "data:image/png;base64," + base64.b64encode(buf.getvalue()).decode("ascii")


def render_html(payload: dict) -> str:
    """The report for a person, as one self-contained HTML page."""
    v = payload["verdict"]
    model = (payload["inputs"]["original"] or {}).get("path", "model")
    if v is None:
        banner = "<div class='verdict none'><b>No verdict</b>: no validation set was given.</div>"
    else:
        cls, word = ("ok", "APPROVED") if v["approved"] else ("no", "REJECTED")
        decided = (f"<br><small>Decided by: {_e(v['metric'])} on {_e(', '.join(v['outputs']) or 'the class scores')}"
                   "</small>") if v.get("metric") else ""
        banner = (f"<div class='verdict {cls}'><b>{word}</b>: {_e(v['reason'])}{decided}"
                  f"<br><small>Rule: {_e(v['rule'])}</small></div>")
    parts = [f"<!doctype html><html><head><meta charset='utf-8'><title>swapper report: {_e(model)}</title>"
             f"<style>{_CSS}</style></head><body><h1>swapper report: {_e(model)}</h1>", banner,
             f"<p class='caution'>{_e(payload['caution'])}</p>", _judged(payload)]
    c = payload["comparison"]
    if c is not None:
        rows = [["samples", c["n"], ""]]
        if c["top1_original"] is not None:
            rows.append(["top-1 accuracy", pct(c["top1_original"]), pct(c["top1_candidate"])])
        if c.get("top5_original") is not None:
            rows.append(["top-5 accuracy", pct(c["top5_original"]), pct(c["top5_candidate"])])
        acc = _table(["", "original", "candidate"], rows)
        extra = []
        if c.get("drop_pp") is not None:
            iv = c.get("interval") or {}
            extra.append(["top-1 drop (original − candidate)", f"{signed(c['drop_pp'])} pp"])
            if c.get("drop_interval_pp"):
                lo, hi = c["drop_interval_pp"]
                extra.append([f"{100 * iv.get('level', 0.95):g}% interval for the drop ({iv.get('method')})",
                              f"[{signed(lo)}, {signed(hi)}] pp"])
            extra.append(["McNemar exact p", f"{num(c['mcnemar_p'])} ({c['n10']} sample(s) now wrong, "
                                             f"{c['n01']} now right)"])
        if c.get("agreement") is not None:
            extra.append(["top-1 agreement", pct(c["agreement"])])
        kinds = c.get("output_kinds") or {}
        for name, errs in (c.get("output_errors") or {}).items():
            kind = kinds.get(name, {}).get("kind")
            per_sample = (f"per-sample cosine mean {num(errs['cosine_mean'], '.5f')}, worst 5% "
                          f"{num(errs['cosine_p5'], '.5f')}, min {num(errs['cosine_min'], '.5f')}; "
                          if "cosine_mean" in errs else "")
            extra.append([f"output {name}" + (f" ({kind})" if kind else ""),
                          per_sample + f"SQNR {num(errs.get('sqnr_db'), '.1f')} dB, max |Δ| "
                          f"{num(errs.get('max_abs'))}, RMSE {num(errs.get('rmse'))}, "
                          f"cosine over all values {num(errs.get('cosine'), '.6f')}"])
        lat, size = payload["latency"], payload["size"]
        rows = [["file bytes", size["original"]["bytes"], size["candidate"]["bytes"]],
                ["nodes", size["original"]["nodes"], size["candidate"]["nodes"]]]
        if lat is None:
            timing = "latency not measured (--no-latency)"
        else:
            rows = [
                ["median latency (ms)", num(lat["original"]["median_ms"]), num(lat["candidate"]["median_ms"])],
                ["p10–p90 (ms)", f"{num(lat['original']['p10_ms'])}–{num(lat['original']['p90_ms'])}",
                 f"{num(lat['candidate']['p10_ms'])}–{num(lat['candidate']['p90_ms'])}"],
                ["latency ratio", "", f"{lat['ratio']:.3f}"],
            ] + rows
            timing = (f"batch {lat['batch_size']}, {lat['threads']} thread(s), median of "
                      f"{lat['original']['runs']} interleaved runs")
        speed = _table(["", "original", "candidate"], rows, numeric={1, 2})
        parts.append("<h2>Accuracy and speed</h2><div class='side'><div>" + acc + _table(["", ""], extra)
                     + f"</div><div>{speed}<small>{timing}</small></div></div>")
        parts.append(_changed(c))
        ops = sorted(set(size["original"]["op_counts"]) | set(size["candidate"]["op_counts"]))
        parts.append("<h2>Operators</h2>" + _table(
            ["op", "original", "candidate"],
            [[op, size["original"]["op_counts"].get(op, 0), size["candidate"]["op_counts"].get(op, 0)] for op in ops],
            numeric={1, 2}))
        if payload["int8"]:
            q = payload["int8"]
            parts.append("<h2>int8 view</h2>" + _table(["", "original", "candidate"], [
                ["top-1 accuracy", pct(q["comparison"].get("top1_original")), pct(q["comparison"].get("top1_candidate"))],
                ["median latency (ms)", *((num(q["latency"]["original"]["median_ms"]),
                                           num(q["latency"]["candidate"]["median_ms"])) if q["latency"]
                                          else ("not measured", "not measured"))],
                ["file bytes", q["size"]["original_bytes"], q["size"]["candidate_bytes"]],
            ]) + f"<small>{_e(q['quantization'])}</small>")
            for w in q.get("lossy_weights") or []:
                parts.append(f"<p>Warning: int8 weights of {_e(w['op_type'])} {_e(w['node'])} lose "
                             f"{100 * w['median_input_error']:.0f}% of the median input channel; input channel "
                             f"{_e(w['dominant_input'])} sets the scale of {100 * w['dominant_share']:.0f}% of its "
                             f"output channels.</p>")
    if payload["sites"]:
        rows = [[s["site_id"], f"{s['function']} → {s['surrogate']}" + (f" ({s['form']})" if s.get("form") else ""),
                 " ".join(f"{k}:{s['placement'].get(k, '-')}" for k in "abcd"),
                 "–" if not s.get("site_nodes") else f"{s['site_nodes']['original']} → {s['site_nodes']['written']}",
                 num(s["mse_start"]), num(s["mse_fit"]), _refit(s.get("refit")), "; ".join(s["notes"])]
                for s in payload["sites"]]
        legend = "".join(f"<li>{_e(line)}</li>" for line in placement_legend(payload["sites"]))
        parts.append("<h2>Swapped sites</h2>" + _table(
            ["site", "function → surrogate", "where a b c d live", "nodes (original → swapped)", "MSE start",
             "MSE fitted", "consumer refit (held-out MSE current → refitted)", "notes"], rows, numeric={4, 5})
            + "<p><small>Where a, b, c, d of y = a·g(b·x + c) + d live:</small></p><ul><small>" + legend
            + "</small></ul><p><small>nodes: the site's nodes in the original → in the swapped model.</small></p>")
    plan = payload.get("plan") or {}
    skipped = plan.get("skipped", [])
    if skipped:
        parts.append("<h2>Left alone</h2>" + _table(["site", "function", "reason"],
                                                    [[s["site_id"], s["function"], s["reason"]] for s in skipped]))
    target_notes = ([f"planned for {plan['target']} at opset {plan.get('opset')}"] if plan.get("target") else []) \
        + [f"remains: {r}" for r in plan.get("remaining", [])] + [f"hint: {h}" for h in plan.get("hints", [])]
    if plan.get("conversion"):
        c = plan["conversion"]
        target_notes.append(f"converted opset {c['from']} → {c['to']}: max |difference| {num(c['max_abs_diff'])} "
                            f"on {c['samples']} samples ({c['compared_on']})")
    if target_notes:
        parts.append("<h2>Target</h2>" + "".join(f"<p>{_e(t)}</p>" for t in target_notes))
    plots = _plots(payload)
    if plots:
        parts.append("<h2>Plots</h2>" + "".join(f"<figure><img alt='{_e(t)}' src='{uri}'><figcaption>{_e(t)}"
                                                 f"</figcaption></figure>" for t, uri in plots))
    parts.append(search_html(payload.get("search")))
    tool = payload["tool"]
    parts.append(f"<p class='foot'>swapper {_e(tool['swapper'])}, onnxruntime {_e(tool['onnxruntime'])}, "
                 f"onnx {_e(tool['onnx'])}; created {_e(payload['created_utc'])}.</p></body></html>")
    return "\n".join(parts)


def _refit(refit: dict | None) -> str:
    """The site's consumer refit decision with its held-out figures, or "-" when none was weighed."""
    if not refit:
        return "-"
    word = "taken" if refit["refitted"] else "not taken"
    if refit.get("mse_current") is None:
        return word
    return f"{word}: {refit['mse_current']:.4g} → {refit['mse_refit']:.4g} ({refit['held_out_samples']} samples)"
