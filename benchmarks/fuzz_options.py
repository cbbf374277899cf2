"""Hand-picked option and path cases for benchmarks/fuzz.py (each runs once per fuzz run).

Every case names its command line with placeholders filled in by the driver: {model} (a demo model copy),
{calib}, {val}, {cand} (a swapped copy of the model), all inside the case folder; ``setup`` prepares odd
files first. ``data_loss`` marks cases whose only correct answer is exit 2 (writing would destroy an input);
``may_change`` lists pre-existing files the user asked to have overwritten.
"""
from __future__ import annotations

import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

SWAP_CAL = ["swap", "{model}", "--calib", "{calib}", "-o", "out.onnx"]
SWAP_VAL = SWAP_CAL + ["--val", "{val}"]
SWAP_NOCAL = ["swap", "{model}", "--no-calibrate", "-o", "out.onnx"]
CHECK = ["check", "{model}", "{cand}", "--val", "{val}"]


@dataclass
class OptionCase:
    name: str
    argv: list[str]
    timeout: float = 60.0
    data_loss: bool = False
    setup: Callable[[Path], None] | None = None
    may_change: tuple[str, ...] = ()
    gate: bool = False  # exit 1 (rejected) is a correct answer
    extra: dict = field(default_factory=dict)


def _file(name: str, text: str = "keep me\n"):
    def setup(work: Path) -> None:
        (work / name).write_text(text)
    return setup


def _fifo(name: str):
    return lambda work: os.mkfifo(work / name)


def _link(name: str, target: str):
    return lambda work: os.symlink(target, work / name)


def _hardlink(name: str, target: str):
    return lambda work: os.link(work / target, work / name)


def _mkdir(name: str):
    return lambda work: (work / name).mkdir(parents=True)


def _external(work: Path) -> None:
    """Rewrite {model} (model.onnx) to keep its weights in weights.bin."""
    import onnx

    m = onnx.load(work / "model.onnx")
    onnx.save_model(m, work / "model.onnx", save_as_external_data=True, all_tensors_to_one_file=True,
                    location="weights.bin", size_threshold=0)


def _calib_folder(work: Path) -> None:
    import numpy as np

    (work / "cal").mkdir()
    with np.load(work / "calib.npz") as z:
        np.save(work / "cal" / "pixels.npy", z["pixels"])


def _markup_out(work: Path) -> None:
    (work / "[").mkdir()


def _both(*fns):
    def setup(work: Path) -> None:
        for fn in fns:
            fn(work)
    return setup


CASES = [
    OptionCase("seed_negative", SWAP_CAL + ["--seed", "-1"]),
    OptionCase("seed_huge", SWAP_CAL + ["--seed", str(2**70)]),
    OptionCase("cache_mb_inf", SWAP_CAL + ["--cache-mb", "inf"]),
    OptionCase("cache_mb_nan", SWAP_CAL + ["--cache-mb", "nan"]),
    OptionCase("cache_mb_1e300", SWAP_CAL + ["--cache-mb", "1e300"]),
    OptionCase("cache_mb_zero", SWAP_CAL + ["--cache-mb", "0"]),
    OptionCase("threads_100000_swap", SWAP_CAL + ["--threads", "100000"], timeout=30),
    OptionCase("threads_100000_check", CHECK + ["--threads", "100000"], timeout=30, gate=True),
    OptionCase("batch_size_1e9_swap", SWAP_CAL + ["--batch-size", "1000000000"]),
    OptionCase("batch_size_1e9_check", CHECK + ["--batch-size", "1000000000"], gate=True),
    OptionCase("budget_nan", SWAP_VAL + ["--budget", "nan"], gate=True),
    OptionCase("budget_inf", SWAP_VAL + ["--budget", "inf"], gate=True),
    OptionCase("budget_negative", CHECK + ["--budget", "-5"], gate=True),
    OptionCase("min_agreement_2", CHECK + ["--min-agreement", "2"], gate=True),
    OptionCase("min_agreement_nan", CHECK + ["--min-agreement", "nan"], gate=True),
    OptionCase("min_agreement_negative", SWAP_VAL + ["--min-agreement", "-1"], gate=True),
    OptionCase("strict_int8_check", CHECK + ["--strict", "--int8"], gate=True, timeout=120),
    OptionCase("demo_out_existing_file", ["demo", "--out", "taken.txt"], setup=_file("taken.txt"), timeout=240),
    OptionCase("demo_out_under_file", ["demo", "--out", "taken.txt/demo"], setup=_file("taken.txt"), timeout=240),
    OptionCase("demo_out_proc", ["demo", "--out", "/proc/swapper-fuzz-demo"], timeout=240),
    OptionCase("out_parent_is_file", SWAP_NOCAL[:-1] + ["taken.txt/out.onnx"], setup=_file("taken.txt")),
    OptionCase("out_under_proc", SWAP_NOCAL[:-1] + ["/proc/swapper-fuzz.onnx"]),
    OptionCase("out_proc_self", SWAP_NOCAL[:-1] + ["/proc/self/swapper-fuzz.onnx"]),
    OptionCase("out_long_name", SWAP_NOCAL[:-1] + ["o" * 300 + ".onnx"]),
    OptionCase("out_is_dir", SWAP_NOCAL[:-1] + ["adir"], setup=_mkdir("adir")),
    OptionCase("out_empty", SWAP_NOCAL[:-1] + [""]),
    OptionCase("out_markup_close", SWAP_NOCAL[:-1] + ["[/b]out.onnx"], setup=_markup_out),
    OptionCase("out_markup_open", SWAP_NOCAL[:-1] + ["[red]out.onnx"]),
    OptionCase("report_under_file", SWAP_VAL + ["--report", "taken.txt/rep"], setup=_file("taken.txt"), gate=True),
    OptionCase("report_under_proc", SWAP_VAL + ["--report", "/proc/swapper-fuzz-rep"], gate=True),
    OptionCase("report_proc_self", SWAP_VAL + ["--report", "/proc/self"], gate=True),
    OptionCase("check_report_proc_self", CHECK + ["--report", "/proc/self"], gate=True),
    OptionCase("check_report_is_file", CHECK + ["--report", "taken.txt"], setup=_file("taken.txt"), gate=True),
    OptionCase("report_json_is_dir", CHECK + ["--report", "rep"], setup=_mkdir("rep/report.json"), gate=True),
    OptionCase("out_is_calib", ["swap", "{model}", "--calib", "{calib}", "-o", "{calib}"], data_loss=True),
    OptionCase("out_is_val", ["swap", "{model}", "--calib", "{calib}", "--val", "{val}", "-o", "{val}"],
               data_loss=True),
    OptionCase("out_is_model", SWAP_NOCAL[:-1] + ["{model}"], data_loss=True),
    OptionCase("out_is_model_dotted", SWAP_NOCAL[:-1] + ["./adir/../model.onnx"], data_loss=True,
               setup=_mkdir("adir")),
    OptionCase("out_is_model_symlink", SWAP_NOCAL[:-1] + ["link.onnx"], data_loss=True,
               setup=_link("link.onnx", "model.onnx")),
    OptionCase("out_is_model_hardlink", SWAP_NOCAL[:-1] + ["hard.onnx"], setup=_hardlink("hard.onnx", "model.onnx"),
               may_change=("hard.onnx",)),
    OptionCase("out_is_external_data", SWAP_NOCAL[:-1] + ["weights.bin"], data_loss=True, setup=_external),
    OptionCase("out_is_calib_folder_member", ["swap", "{model}", "--calib", "cal", "-o", "cal/pixels.npy"],
               data_loss=True, setup=_calib_folder),
    OptionCase("out_link_to_calib", SWAP_CAL[:-1] + ["link.onnx"], setup=_link("link.onnx", "calib.npz"),
               may_change=("link.onnx",)),
    OptionCase("external_data_model_swap", SWAP_CAL, setup=_external),
    OptionCase("model_markup_close_scan", ["scan", "[/b]m.onnx"],
               setup=lambda w: (_markup_out(w), os.link(w / "model.onnx", w / "[" / "b]m.onnx"))),
    OptionCase("model_markup_close_swap",
               ["swap", "[/b]m.onnx", "--calib", "{calib}", "--val", "{val}", "-o", "o.onnx"],
               setup=lambda w: (_markup_out(w), os.link(w / "model.onnx", w / "[" / "b]m.onnx")), gate=True),
    OptionCase("model_markup_open_scan", ["scan", "[red]m.onnx"],
               setup=lambda w: os.link(w / "model.onnx", w / "[red]m.onnx")),
    OptionCase("model_fifo", ["scan", "pipe.onnx"], setup=_fifo("pipe.onnx"), timeout=20),
    OptionCase("calib_fifo", SWAP_CAL[:3] + ["pipe.npz", "-o", "out.onnx"], setup=_fifo("pipe.npz"), timeout=20),
    OptionCase("model_devzero", ["scan", "zero.onnx"], setup=_link("zero.onnx", "/dev/zero"), timeout=30),
    OptionCase("model_devnull", ["scan", "null.onnx"], setup=_link("null.onnx", "/dev/null")),
    OptionCase("model_long_name", ["scan", "m" * 300 + ".onnx"]),
    OptionCase("model_dir", ["scan", "adir"], setup=_mkdir("adir")),
    OptionCase("model_missing", ["scan", "nothere.onnx"]),
    OptionCase("model_link_loop", ["scan", "loop.onnx"], setup=_both(_link("loop.onnx", "loop2.onnx"),
                                                                      _link("loop2.onnx", "loop.onnx"))),
    OptionCase("fold_bogus", SWAP_NOCAL + ["--fold", "bogus"]),
    OptionCase("mode_bogus", SWAP_CAL + ["--mode", "bogus"]),
    OptionCase("to_bogus", SWAP_NOCAL + ["--to", "bogus"]),
    OptionCase("only_bogus", SWAP_NOCAL + ["--only", "bogus"]),
    OptionCase("sites_bogus", SWAP_NOCAL + ["--sites", "s99,,s1"]),
    OptionCase("refit_without_calib", SWAP_NOCAL + ["--refit-consumers"]),
    OptionCase("calib_and_no_calibrate", SWAP_CAL + ["--no-calibrate"]),
    OptionCase("neither_calib_nor_no_calibrate", ["swap", "{model}", "-o", "out.onnx"]),
    OptionCase("unknown_option", SWAP_NOCAL + ["--bogus"]),
    OptionCase("threads_zero", SWAP_NOCAL + ["--threads", "0"]),
    OptionCase("threads_not_int", SWAP_NOCAL + ["--threads", "abc"]),
    OptionCase("check_missing_val", ["check", "{model}", "{cand}"]),
    OptionCase("check_same_file", ["check", "{model}", "{model}", "--val", "{val}"], gate=True),
    OptionCase("check_other_model", ["check", "{model}", "other.onnx", "--val", "{val}"], gate=True),
    OptionCase("to_each_surrogate_refit", SWAP_VAL + ["--to", "pwl", "--refit-consumers", "--fold", "off",
                                                      "--mode", "local", "--include-gates", "--include-outputs"],
               gate=True, timeout=120),
    OptionCase("force_reject", SWAP_VAL + ["--to", "relu", "--budget", "0", "--min-agreement", "1", "--force"],
               gate=True),
]
