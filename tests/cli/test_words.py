"""Words a practitioner reads without the README: --help at 80 columns, --version, `swapper functions`,
the swapped-sites table with its legend, the nodes column, and lines printed only where they apply.

References: the option names come from the command objects click builds (not from the help text under
test); the version from pyproject.toml read with tomllib; costs from swapper/functions/op_costs.json read
with json; node counts from the ONNX files themselves.
"""
from __future__ import annotations

import json
import re
from pathlib import Path

import onnx
import pytest
import tomllib
import typer
from testkit import CALIB, DEMO, VAL

from swapper.cli.app import app

ROOT = Path(__file__).resolve().parents[2]
COMMANDS = ("scan", "functions", "targets", "swap", "sweep", "check", "demo", "bench")


@pytest.fixture
def cli_at():
    """``cli_at(columns, *args)``: the command line in-process with a terminal ``columns`` wide."""
    from typer.testing import CliRunner

    runner = CliRunner()
    return lambda columns, *args: runner.invoke(app, [str(a) for a in args], env={"COLUMNS": str(columns)})


def _option_names(command: str) -> list[str]:
    """Every long option of ``command``, from click's own parameter objects."""
    group = typer.main.get_command(app)
    params = group.commands[command].params
    return [name for p in params for name in (*p.opts, *p.secondary_opts) if name.startswith("--")]


@pytest.mark.parametrize("command", COMMANDS)
def test_help_at_80_columns_shows_every_option_name_whole(cli_at, command):
    result = cli_at(80, command, "--help")
    assert result.exit_code == 0, result.output
    assert "…" not in result.stdout  # an ellipsis is how a cut cell shows
    for name in _option_names(command):
        assert re.search(rf"(^|[\s,/]){re.escape(name)}([\s,=/]|$)", result.stdout, re.M), name
    # every line fits: 80 columns is the width a terminal opens with (common practice, no source)
    assert max(len(line) for line in result.stdout.splitlines()) <= 80


def test_top_level_help_lists_every_command_without_cutting_it(cli_at):
    result = cli_at(80, "--help")
    assert result.exit_code == 0
    for command in COMMANDS:
        line = next(ln for ln in result.stdout.splitlines() if ln.strip().startswith(command + " "))
        assert not line.rstrip().endswith("..."), line  # click cuts a summary that does not fit with "..."
    assert "Exit codes" in result.stdout


def test_version_is_the_packaged_one(cli):
    result = cli("--version")
    # source: the project's own metadata, pyproject.toml [project] version
    version = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]["version"]
    assert result.exit_code == 0 and result.stdout.strip() == f"swapper {version}"


def test_functions_lists_costs_with_their_unit_and_never_calls_a_dearer_surrogate_cheaper(cli):
    result = cli("functions")
    assert result.exit_code == 0, result.output
    text = result.stdout
    first = text.splitlines()[0]
    assert "relative to Relu" in first and "Relu = 1.00" in first and "onnxruntime" in first
    # source: the measured table itself (json), not the registry under test
    table = json.loads((ROOT / "swapper/functions/op_costs.json").read_text())
    costs = table["costs"]
    assert table["measured"]["date"] in first and table["measured"]["onnxruntime"] in first
    header = next(ln for ln in text.splitlines() if "function" in ln and "kind" in ln)
    assert "cost" in header and "default surrogate" in header
    rows = {m.group(1): m for m in re.finditer(r"^│ (\w+)\s+│ (\w+)\s+│\s+([\d.]+)", text, re.M)}
    assert set(rows) == set(costs)
    for name, m in rows.items():
        assert float(m.group(3)) == pytest.approx(costs[name], abs=0.005)
    # hard_swish costs more than silu on this measurement: silu's row must say so, not present it as cheaper
    silu = next(ln for ln in text.splitlines() if ln.startswith("│ silu "))
    assert costs["hard_swish"] > costs["silu"] and "costs more here" in silu
    swish = next(i for i, ln in enumerate(text.splitlines()) if ln.startswith("│ hard_swish "))
    block = " ".join(text.splitlines()[swish:swish + 3])
    assert "costs more here than" in block and "silu" in block
    relu = next(ln for ln in text.splitlines() if ln.startswith("│ relu "))
    assert "costs more" not in relu  # relu (1.00) is dearer than no swappable function here


@pytest.fixture(scope="module")
def cnn_swap(tmp_path_factory):
    from typer.testing import CliRunner

    root = tmp_path_factory.mktemp("words")
    out = root / "cnn.onnx"
    result = CliRunner().invoke(app, ["swap", str(DEMO / "meter_cnn_silu.onnx"), "-o", str(out), "--calib",
                                      str(CALIB), "--val", str(VAL), "--plan", "all", "--target", "none",
                                      "--no-latency", "--report", str(root / "rep")])
    assert result.exit_code == 0, result.output
    return result, out, json.loads((root / "rep" / "report.json").read_text())


def test_the_swap_table_explains_its_placement_words_beneath_it(cnn_swap):
    result, _, report = cnn_swap
    lines = result.stdout.splitlines()
    end = max(i for i, ln in enumerate(lines) if ln.startswith("└"))
    below = "\n".join(lines[end + 1:end + 12])
    used = {w for s in report["sites"] for w in s["placement"].values()}
    assert used >= {"producer", "consumers", "fixed"}  # the demo CNN's SiLUs under --fold exact
    for word in used:
        assert re.search(rf"^\s+{re.escape(word)}: \S", below, re.M), word
    assert "nodes: the site's nodes in the original" in below
    for old in ("held", "inner", "consumers+", "pointwise"):  # the older words never reach the terminal
        # as words: "held-out" (the refit column's samples kept apart from its fit) is the statistics term
        pattern = re.escape(old) if old.endswith("+") else rf"\b{old}\b(?!-out)"
        assert not re.search(pattern, result.stdout), old


def test_the_default_fold_adds_no_node_at_any_site(cnn_swap):
    _, out, report = cnn_swap
    original = onnx.load(str(DEMO / "meter_cnn_silu.onnx"))
    written = onnx.load(str(out))
    scan = {s["id"]: s for s in _scan_json(DEMO / "meter_cnn_silu.onnx")}
    for s in report["sites"]:
        # README "Folding": --fold exact adds no nodes; the site's own nodes (x·Sigmoid(x): 2) become 1 surrogate
        assert s["nodes_added"] == 0
        assert s["site_nodes"]["original"] == len(scan[s["site_id"]]["nodes"])
        assert s["site_nodes"]["written"] <= s["site_nodes"]["original"]
    # the counts add up to the files' own node counts
    change = sum(s["site_nodes"]["written"] - s["site_nodes"]["original"] for s in report["sites"])
    assert len(written.graph.node) == len(original.graph.node) + change


def _scan_json(path: Path) -> list[dict]:
    from typer.testing import CliRunner

    result = CliRunner().invoke(app, ["scan", str(path), "--json"])
    return json.loads(result.stdout)["sites"]


def test_token_positions_are_mentioned_only_for_models_with_token_sites(cnn_swap):
    result, _, _ = cnn_swap
    # the demo CNN's sites are [N, C, H, W] feature maps: nothing an attention mask could mark
    assert "token positions" not in result.stdout
