"""report.json and report.html as written by the CLI.

report.json is checked twice: by ``swapper.report.build.validate_report`` and, field
by field, against the schema in the swapper/report/build.py module docstring. The
figures in it are recomputed here from the written files with hashlib,
onnxruntime, scikit-learn and statsmodels. report.html is checked for the
verdict, the caution and self-containment (no external references).
"""
from __future__ import annotations

import copy
import importlib.util
import json
import math
import platform
import shutil
from collections import Counter
from datetime import datetime, timedelta, timezone
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import onnx
import onnxruntime as ort
import pytest
from sklearn.metrics import accuracy_score
from statsmodels.stats.contingency_tables import mcnemar
from testkit import CALIB, DEMO, VAL, run, sha256

from swapper.report.build import validate_report


def logits(path: Path) -> np.ndarray:
    return run(path, {"pixels": np.load(VAL)["pixels"]})[0]


@pytest.fixture(scope="module")
def runs(cli, tmp_path_factory):
    """Three CLI runs: calibrated + gated (approved), gated rejection, and no validation at all."""
    root = tmp_path_factory.mktemp("report")
    cnn = root / "meter_cnn_silu.onnx"
    mlp = root / "meter_mlp_tanh_sigmoid.onnx"
    shutil.copyfile(DEMO / "meter_cnn_silu.onnx", cnn)
    shutil.copyfile(DEMO / "meter_mlp_tanh_sigmoid.onnx", mlp)
    out = {}
    r = cli("swap", cnn, "-o", root / "cnn.onnx", "--calib", CALIB, "--val", VAL, "--plan", "all",
            "--report", root / "gated")
    assert r.exit_code == 0, r.output  # measured: silu -> relu on ort-cpu, drop -0.67 pp, budget 1 pp
    out["gated"] = {"original": cnn, "candidate": root / "cnn.onnx", "dir": root / "gated"}
    # measured: 96.22% -> 96.67%, interval lower end -0.57 pp, so --budget 0 --strict rejects
    r = cli("swap", mlp, "-o", root / "rej.onnx", "--no-calibrate", "--to", "hard_tanh", "--val", VAL,
            "--budget", 0, "--strict", "--report", root / "rejected")
    assert r.exit_code == 1, r.output
    out["rejected"] = {"original": mlp, "candidate": None, "dir": root / "rejected"}
    r = cli("swap", mlp, "-o", root / "plain.onnx", "--no-calibrate", "--report", root / "plain")
    assert r.exit_code == 0, r.output
    out["plain"] = {"original": mlp, "candidate": root / "plain.onnx", "dir": root / "plain"}
    for entry in out.values():
        entry["json"] = json.loads((entry["dir"] / "report.json").read_text())
        entry["html"] = (entry["dir"] / "report.html").read_text()
    return out


# ----------------------------------------------------------------------------- report.json: schema


@pytest.mark.parametrize("which", ["gated", "rejected", "plain"])
def test_report_passes_the_validator(runs, which):
    validate_report(runs[which]["json"])


@pytest.mark.parametrize("mutate", [
    lambda p: p.pop("caution"),
    lambda p: p.__setitem__("schema", "swapper.report/2"),
    lambda p: p["verdict"].__setitem__("approved", "yes"),
    lambda p: p["inputs"]["original"].pop("sha256"),
    lambda p: p["sites"][0].pop("mse_fit"),
    lambda p: p["comparison"].__setitem__("delta_pp", float("nan")),
])
def test_validator_rejects_broken_reports(runs, mutate):
    payload = copy.deepcopy(runs["gated"]["json"])
    mutate(payload)
    with pytest.raises(ValueError):
        validate_report(payload)


def _is_num(x) -> bool:
    return isinstance(x, (int, float)) and not isinstance(x, bool) and math.isfinite(x)


def test_report_fields_follow_the_documented_schema(runs):
    # source: swapper/report/build.py module docstring, schema swapper.report/1 (every key present, null when not run)
    p = runs["gated"]["json"]
    assert set(p) == {"schema", "created_utc", "tool", "inputs", "plan", "sites", "calibration", "comparison",
                      "budget", "verdict", "latency", "size", "int8", "search", "options", "caution"}
    assert p["schema"] == "swapper.report/1"
    assert p["search"] is None  # --plan all: no automatic plan
    created = datetime.fromisoformat(p["created_utc"])  # ISO 8601
    assert created.tzinfo is not None and abs(datetime.now(timezone.utc) - created) < timedelta(minutes=30)

    import onnx as _onnx
    import scipy
    import sklearn

    assert p["tool"] == {"swapper": p["tool"]["swapper"], "python": platform.python_version(),
                         "onnx": _onnx.__version__, "onnxruntime": ort.__version__, "numpy": np.__version__,
                         "scipy": scipy.__version__, "scikit-learn": sklearn.__version__}
    assert isinstance(p["tool"]["swapper"], str) and p["tool"]["swapper"]

    assert set(p["inputs"]) == {"original", "candidate", "calibration", "validation"}
    for entry in p["inputs"].values():
        assert set(entry) == {"path", "sha256", "bytes"}
        assert isinstance(entry["path"], str) and len(entry["sha256"]) == 64 and isinstance(entry["bytes"], int)

    plan = p["plan"]
    assert set(plan) == {"fold", "swaps", "skipped", "target", "opset", "conversion", "remaining", "hints"}
    assert plan["fold"] == "exact" and plan["target"] == "ort-cpu"  # README: exact and ort-cpu by default
    assert plan["opset"] == 17 and plan["conversion"] is None  # demo_models/manifest.json: opset 17
    # README "What gets swapped": hidden costly sites by default; relu is cheap, gates need --include-gates
    assert [s["site_id"] for s in plan["swaps"]] == ["s1", "s2", "s3"]
    assert sorted(s["site_id"] for s in plan["skipped"]) == ["s4", "s5"]
    # README "Targets": on ort-cpu x·Sigmoid(x) fuses to QuickGelu (1.16 in ort-cpu.json); hard_swish's cheapest
    # form there, HardSigmoid then Mul (1.0 + 1.295), does not pay; relu fuses into the Conv (0)
    assert {s["function"]: (s["surrogate"], s["form"]) for s in plan["swaps"]} == {"silu": ("relu", "Relu")}

    original = onnx.load(str(runs["gated"]["original"]))
    node_names = {n.name for n in original.graph.node}
    assert [s["site_id"] for s in p["sites"]] == ["s1", "s2", "s3"]
    for s in p["sites"]:
        assert set(s) == {"site_id", "function", "surrogate", "form", "placement", "nodes_added", "site_nodes",
                          "folded_into", "mse_start", "mse_fit", "level", "bias_corrected", "refit", "notes"}
        assert set(s["site_nodes"]) == {"original", "written"}
        assert (s["function"], s["surrogate"], s["form"]) == ("silu", "relu", "Relu")
        assert set(s["placement"]) == {"a", "b", "c", "d"} and all(isinstance(v, str) for v in s["placement"].values())
        assert isinstance(s["nodes_added"], int) and s["nodes_added"] >= 0
        assert set(s["folded_into"]) <= node_names  # folds go into the original's own nodes
        assert set(s["bias_corrected"]) <= node_names
        assert _is_num(s["mse_start"]) and _is_num(s["mse_fit"]) and s["mse_fit"] >= 0
        assert isinstance(s["level"], int) and s["level"] >= 1
        assert all(isinstance(n, str) for n in s["notes"]) and len(set(s["notes"])) == len(s["notes"])
    # sequential calibration: the three SiLUs are chained, so their depths are 1, 2, 3
    assert [s["level"] for s in p["sites"]] == [1, 2, 3]

    cal = p["calibration"]
    assert {"samples", "timings_s"} <= set(cal)
    assert cal["samples"] == 256  # source: demo_models/README.md, calib.npz has 256 rows
    assert all(_is_num(v) and v >= 0 for v in cal["timings_s"].values())

    c = p["comparison"]
    assert {"n", "task", "top1_original", "top1_candidate", "delta_pp", "n01", "n10", "mcnemar_p", "interval",
            "agreement", "output_errors", "has_nonfinite", "signature_changed"} <= set(c)
    assert c["n"] == 450 and c["task"] == "classification"  # val.npz: 450 rows with labels
    assert c["has_nonfinite"] is False and c["signature_changed"] is False
    assert p["budget"] == {"max_drop_pp": 1.0, "strict": False, "min_agreement": None}  # README defaults
    assert set(p["verdict"]) == {"approved", "reason", "rule", "metric", "outputs", "thresholds", "caution"}
    assert p["verdict"]["caution"] == p["caution"]
    # options: the swap's settings as given on the command line, the gate's, the command's own
    assert set(p["options"]) == {"swap", "gate", "run"}
    assert p["options"]["swap"]["fold"] == "exact" and p["options"]["swap"]["target"] == "ort-cpu"
    assert p["options"]["gate"]["max_drop_pp"] == 1.0 and p["options"]["run"]["plan"] == "all"
    assert p["verdict"]["approved"] is True and p["verdict"]["metric"] == "top1"  # labels + class scores
    assert "1.00 pp" in p["verdict"]["rule"]  # README: the rule field states the rule with its numbers

    lat = p["latency"]
    assert set(lat) == {"original", "candidate", "ratio", "clock", "batch_size", "threads", "target"}
    assert lat["clock"] == "thread CPU time"  # one thread (the default): swapper/api.py _timed
    # the swap's timing on its target (ort-cpu by default; conftest's stand-in clock answers 0.9)
    assert lat["target"]["target"] == "ort-cpu" and lat["target"]["ratio"] == pytest.approx(0.9)
    for m in ("original", "candidate"):
        assert set(lat[m]) == {"median_ms", "p10_ms", "p90_ms", "runs"}
        assert 0 < lat[m]["p10_ms"] <= lat[m]["median_ms"] <= lat[m]["p90_ms"] and lat[m]["runs"] > 0
    assert lat["ratio"] == pytest.approx(lat["candidate"]["median_ms"] / lat["original"]["median_ms"])
    assert lat["batch_size"] == 64 and lat["threads"] == 1  # CLI defaults

    size = p["size"]
    for m in ("original", "candidate"):
        assert set(size[m]) == {"bytes", "nodes", "op_counts", "initializer_bytes"}
    # node and op counts agree with the files themselves
    written = onnx.load(str(runs["gated"]["candidate"]))
    assert size["original"]["nodes"] == len(original.graph.node)
    assert size["candidate"]["nodes"] == len(written.graph.node)
    assert size["original"]["op_counts"] == dict(Counter(n.op_type for n in original.graph.node))
    assert size["candidate"]["op_counts"] == dict(Counter(n.op_type for n in written.graph.node))
    assert p["int8"] is None  # --int8 not given

    assert "not a certification" in p["caution"] and "field data" in p["caution"]


def test_report_without_validation_has_nulls(runs):
    # source: swapper/report/build.py docstring: comparison ... int8 "All null when no validation ran";
    # mse values null without calibration; calibration null.
    p = runs["plain"]["json"]
    for key in ("comparison", "budget", "verdict", "latency", "size", "int8", "calibration"):
        assert p[key] is None, key
    assert p["inputs"]["validation"] is None and p["inputs"]["calibration"] is None
    assert p["inputs"]["candidate"]["sha256"] == sha256(runs["plain"]["candidate"])
    assert [s["site_id"] for s in p["sites"]] == ["s1", "s2"]
    for s in p["sites"]:
        assert s["mse_start"] is None and s["mse_fit"] is None and s["level"] is None


def test_rejected_report_has_no_candidate_entry(runs):
    p = runs["rejected"]["json"]
    assert p["verdict"]["approved"] is False and p["inputs"]["candidate"] is None
    assert p["inputs"]["calibration"] is None
    assert p["budget"] == {"max_drop_pp": 0.0, "strict": True, "min_agreement": None}


# ----------------------------------------------------------------------------- report.json: figures


@pytest.mark.parametrize("which", ["gated", "rejected", "plain"])
def test_input_hashes_match_the_files(runs, which):
    files, p = runs[which], runs[which]["json"]
    expected = {"original": files["original"], "candidate": files["candidate"],
                "calibration": CALIB if which == "gated" else None,
                "validation": VAL if which != "plain" else None}
    for key, path in expected.items():
        if path is None:
            assert p["inputs"][key] is None, key
            continue
        entry = p["inputs"][key]
        assert Path(entry["path"]).resolve() == Path(path).resolve()
        assert entry["sha256"] == sha256(path)  # source: hashlib.sha256 of the file bytes
        assert entry["bytes"] == Path(path).stat().st_size


def test_accuracy_figures_match_an_independent_computation(runs):
    files, c = runs["gated"], runs["gated"]["json"]["comparison"]
    labels = np.load(VAL)["labels"]
    y_o, y_c = logits(files["original"]), logits(files["candidate"])
    pred_o, pred_c = y_o.argmax(axis=1), y_c.argmax(axis=1)
    # source: scikit-learn accuracy_score of onnxruntime argmax predictions
    assert c["top1_original"] == pytest.approx(accuracy_score(labels, pred_o), abs=1e-12)
    assert c["top1_candidate"] == pytest.approx(accuracy_score(labels, pred_c), abs=1e-12)
    # source: demo_models/manifest.json val_accuracy of the original, measured by build.py
    manifest = json.loads((DEMO / "manifest.json").read_text())
    assert c["top1_original"] == pytest.approx(manifest["models"]["meter_cnn_silu.onnx"]["val_accuracy"])
    assert c["delta_pp"] == pytest.approx(100 * (c["top1_candidate"] - c["top1_original"]))
    ok_o, ok_c = pred_o == labels, pred_c == labels
    n01, n10 = int(np.sum(~ok_o & ok_c)), int(np.sum(ok_o & ~ok_c))
    assert (c["n01"], c["n10"]) == (n01, n10)  # n01: original wrong, candidate right (evaluate.py)
    table = [[int(np.sum(ok_o & ok_c)), n10], [n01, int(np.sum(~ok_o & ~ok_c))]]
    # source: statsmodels mcnemar(exact=True), the exact binomial McNemar test
    assert c["mcnemar_p"] == pytest.approx(mcnemar(table, exact=True).pvalue, rel=1e-9)
    assert c["agreement"] == pytest.approx(np.mean(pred_o == pred_c), abs=1e-12)
    iv = c["interval"]
    assert iv["level"] == 0.95 and iv["lo_pp"] <= c["delta_pp"] <= iv["hi_pp"]
    # the drop people read: original − candidate, its interval the difference's interval mirrored
    assert c["drop_pp"] == pytest.approx(100 * (accuracy_score(labels, pred_o) - accuracy_score(labels, pred_c)))
    assert c["drop_interval_pp"] == pytest.approx([-iv["hi_pp"], -iv["lo_pp"]])
    # the samples that changed class, recomputed from onnxruntime's outputs (argmax per row)
    moved = np.flatnonzero(pred_o != pred_c)
    ch = c["changed"]
    assert ch["count"] == moved.size and ch["discordant"] == n01 + n10  # McNemar's discordant pairs
    assert [r["index"] for r in ch["samples"]] == moved[:100].tolist()
    assert all((r["original"], r["candidate"], r["label"]) == (pred_o[r["index"]], pred_c[r["index"]],
                                                               labels[r["index"]]) for r in ch["samples"])
    # output errors, definitions from swapper/check/stats.py docstring (max |Δ|, RMSE, cosine, SQNR)
    err = c["output_errors"]["logits"]
    diff = (y_c - y_o).astype(np.float64)
    ref = y_o.astype(np.float64)
    assert err["max_abs"] == pytest.approx(np.abs(diff).max(), rel=1e-4)
    assert err["rmse"] == pytest.approx(np.sqrt(np.mean(diff ** 2)), rel=1e-4)
    cos = np.sum(ref * y_c) / (np.linalg.norm(ref) * np.linalg.norm(y_c.astype(np.float64)))
    assert err["cosine"] == pytest.approx(cos, abs=1e-6)
    assert err["sqnr_db"] == pytest.approx(10 * np.log10(np.sum(ref ** 2) / np.sum(diff ** 2)), abs=1e-3)


def test_gate_decision_follows_the_readme_rule(runs):
    for which in ("gated", "rejected"):
        p = runs[which]["json"]
        c, b = p["comparison"], p["budget"]
        drop = 100 * (c["top1_original"] - c["top1_candidate"])
        # README "The gate": point rule, or with --strict the upper end of the 95% interval for the drop
        upper = c["drop_interval_pp"][1] if b["strict"] else drop
        assert p["verdict"]["approved"] is (upper <= b["max_drop_pp"] + 1e-9), which


# ----------------------------------------------------------------------------- report.html


class _Refs(HTMLParser):
    """Collects every attribute value and text run of a page."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.attrs: list[tuple[str, str, str]] = []
        self.text: list[str] = []
        self.tags: list[str] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        self.attrs.extend((tag, k, v or "") for k, v in attrs)

    handle_startendtag = handle_starttag

    def handle_data(self, data):
        self.text.append(data)


@pytest.mark.parametrize("which,word", [("gated", "APPROVED"), ("rejected", "REJECTED"), ("plain", "No verdict")])
def test_html_shows_verdict_and_caution_and_is_self_contained(runs, which, word):
    page = runs[which]["html"]
    parser = _Refs()
    parser.feed(page)
    parser.close()
    text = " ".join(" ".join(parser.text).split())
    assert word in text
    assert " ".join(runs[which]["json"]["caution"].split()) in text
    for tag, name, value in parser.attrs:
        if name in ("src", "href", "action", "poster", "srcset", "data"):
            assert value.startswith(("data:", "#")), (tag, name, value[:80])
        elif not name.startswith("xmlns"):
            assert "http://" not in value and "https://" not in value, (tag, name, value[:80])
    assert "http://" not in text and "https://" not in text
    assert not {"script", "link", "iframe", "object", "embed"} & set(parser.tags)
    styles = "".join(t for t in parser.text if "{" in t)  # the inline <style> text
    assert "@import" not in styles and "url(" not in styles.replace("url(data:", "")


@pytest.mark.parametrize("which", ["gated", "rejected", "plain"])
def test_html_puts_the_caution_directly_under_the_verdict(runs, which):
    page = runs[which]["html"]
    banner = page.index("<div class='verdict")
    after = page[page.index("</div>", banner) + len("</div>"):].lstrip()
    # the next element after the banner is the caution, before any section heading
    assert after.startswith("<p class='caution'>"), after[:80]
    assert after.index(runs[which]["json"]["caution"].split(".")[0]) < after.index("<h2>")


@pytest.mark.parametrize("which", ["gated", "rejected"])
def test_html_says_what_was_judged(runs, which):
    p, page = runs[which]["json"], runs[which]["html"]
    judged = page[page.index("<h2>What was judged</h2>"):page.index("<h2>Accuracy")]
    for key in ("original", "validation"):
        assert p["inputs"][key]["sha256"] in judged and p["inputs"][key]["path"] in judged
    if which == "rejected":
        assert "not written" in judged  # a rejected candidate is not on disk: no hash to show
    assert ">fold<" in judged and ">max_drop_pp<" in judged  # the settings used


def test_html_lists_the_samples_that_changed_class(runs):
    c, page = runs["gated"]["json"]["comparison"], runs["gated"]["html"]
    ch = c["changed"]
    assert ch["count"] > 0  # measured: the calibrated relu swap moves a few of the 450 digits
    section = page[page.index("<h2>Samples that changed class</h2>"):]
    assert f"{ch['count']} of {c['n']} validation samples" in section
    assert f"{c['n10']} now wrong, {c['n01']} now right" in section
    for r in ch["samples"]:
        assert f"<td class='n'>{r['index']}</td><td class='n'>{r['label']}</td>" in section


def test_html_never_prints_a_negative_zero(runs):
    for which in ("gated", "rejected"):
        assert "-0.00" not in runs[which]["html"] and "−0.00" not in runs[which]["html"]


def test_html_shows_the_measured_figures(runs):
    p, page = runs["gated"]["json"], runs["gated"]["html"]
    c = p["comparison"]
    assert f"{100 * c['top1_original']:.2f}%" in page and f"{100 * c['top1_candidate']:.2f}%" in page
    for s in p["sites"]:
        assert f">{s['site_id']}<" in page
        assert f"{s['function']} → {s['surrogate']} ({s['form']})" in page  # the form the plan chose and the graph holds
    assert f"planned for {p['plan']['target']} at opset {p['plan']['opset']}" in page
    # plots are embedded as PNG data URIs when the optional matplotlib is installed (report.py docstring)
    if importlib.util.find_spec("matplotlib") is not None:
        assert "src='data:image/png;base64," in page
