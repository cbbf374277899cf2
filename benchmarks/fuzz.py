"""Long-run mutation fuzzer for the `swapper` command line.

    python benchmarks/fuzz.py --seed 1 --models 2000 --data 500 --jobs 2
    python benchmarks/fuzz.py --seed 1 --models 2000 --data 500 --jobs 2 --launch fork --confirm
    python benchmarks/fuzz.py --seed 1 --only m00042 --keep      # replay one case, keep its folder

Each case is a hostile input (a mutated demo model, a mutated calibration/validation set, or an odd option)
and one command (scan, scan --json, swap --no-calibrate, swap --calib, swap --calib --val, check, demo), run
in a fresh subprocess (`python -c "from swapper.cli import app; app()"`) inside its own folder, with a
timeout and an address-space limit, then judged against the README's promises (fuzz_judge.py: OK, TRACEBACK,
HANG, CRASH, WRONG_EXIT, MULTILINE, INPUT_CHANGED). `--launch fork` imports the CLI once per worker and forks
a child per run (ten times faster); `--confirm` then replays every distinct failure with a fresh interpreter.

Cases are seeded per (seed, kind, index), so `--seed S --only ID` rebuilds exactly the same input.
Results: OUT/summary.json, OUT/digest.md, OUT/runs.jsonl, and the inputs of failing cases under OUT/cases/.
"""
from __future__ import annotations

import argparse
import collections
import json
import os
import random
import shutil
import subprocess
import sys
import tempfile
import time
from concurrent.futures import ProcessPoolExecutor, as_completed
from dataclasses import asdict, dataclass, field
from datetime import datetime, timezone
from pathlib import Path

import numpy as np
import onnx

sys.path.insert(0, str(Path(__file__).resolve().parent))
import fuzz_data  # noqa: E402
import fuzz_launch  # noqa: E402
import fuzz_models  # noqa: E402
import fuzz_options  # noqa: E402
from fuzz_judge import Case, classify, snapshot  # noqa: E402
from fuzz_report import digest, summarise  # noqa: E402

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "demo_models"
MODELS = ("meter_cnn_silu", "meter_gelu_mlp", "meter_mlp_mish_gelutanh", "meter_mlp_tanh_sigmoid")
CLI = fuzz_launch.CLI
# a normal run of the demo models takes 2-15 s here (most of it imports); ten times that is a hang
TIMEOUTS = {"scan": 20, "scan --json": 20, "swap --no-calibrate": 30, "swap --calib": 45,
            "swap --calib --val": 60, "check": 45}
@dataclass
class Settings:
    seed: int
    root: Path  # where case folders live (temporary)
    out: Path
    mem_bytes: int
    keep: bool = False
    launch: str = "exec"
    base: dict = field(default_factory=dict)


# ---------------------------------------------------------------- preparing shared inputs


def prepare(root: Path) -> dict:
    """Copy the demo files, make a swapped candidate per model (via the CLI) and the zip bomb, once."""
    base = root / "_base"
    base.mkdir(parents=True)
    for name in MODELS:
        shutil.copy(DEMO / f"{name}.onnx", base / f"{name}.onnx")
        proc = subprocess.run(CLI + ["swap", str(base / f"{name}.onnx"), "--no-calibrate", "-o",
                                     str(base / f"{name}.cand.onnx")], cwd=base, capture_output=True, text=True,
                              env=child_env(root))
        if proc.returncode != 0:
            sys.exit(f"cannot make the candidate for {name}: {proc.stderr.strip()[-500:]}")
    for name in ("calib.npz", "val.npz"):
        shutil.copy(DEMO / name, base / name)
    fuzz_data.build_bomb(base / "bomb.npz")
    return {"dir": str(base)}


def child_env(root: Path) -> dict:
    """The environment of every run: this checkout first on the path, byte code cached outside the tree."""
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join([str(ROOT)] + [p for p in env.get("PYTHONPATH", "").split(os.pathsep) if p])
    env.pop("COLUMNS", None)
    env.pop("PYTHONDONTWRITEBYTECODE", None)  # start-up is most of a short run: compile once per fuzz run
    env["PYTHONPYCACHEPREFIX"] = str(root / "_pycache")
    return env


# ---------------------------------------------------------------- building cases


_BASES: dict = {}


def _bases(settings: Settings) -> dict:
    """The parsed demo models and arrays, loaded once per worker process."""
    if not _BASES:
        base = Path(settings.base["dir"])
        _BASES["models"] = {n: onnx.load(base / f"{n}.onnx") for n in MODELS}
        _BASES["bytes"] = [(base / f"{n}.onnx").read_bytes() for n in MODELS]
        for name in ("calib", "val"):
            with np.load(base / f"{name}.npz") as z:
                _BASES[name] = {k: z[k] for k in z.files}
    return _BASES


def _copy_base(settings: Settings, work: Path, model: str) -> None:
    base = Path(settings.base["dir"])
    shutil.copy(base / f"{model}.onnx", work / "orig.onnx")
    shutil.copy(base / f"{model}.cand.onnx", work / "cand.onnx")
    shutil.copy(base / "calib.npz", work / "calib.npz")
    shutil.copy(base / "val.npz", work / "val.npz")


def build_model_case(settings: Settings, index: int, work: Path) -> Case:
    rng = random.Random(f"{settings.seed}/model/{index}")
    model = rng.choice(MODELS)
    bases = _bases(settings)
    _copy_base(settings, work, model)
    name = rng.choices(("model.onnx", "[red]model.onnx", "[/b]model.onnx", "mo del.onnx"), (94, 2, 2, 2))[0]
    ctx = fuzz_models.Ctx(work=work, np_rng=np.random.default_rng(rng.getrandbits(64)), others=bases["bytes"],
                          model_name=name)
    mutation, _ = fuzz_models.make_model_mutant(bases["models"][model], rng, ctx)
    command = rng.choices(("scan", "scan --json", "swap --no-calibrate", "swap --calib", "check", "check orig"),
                          (30, 15, 25, 15, 10, 5))[0]
    argv = {
        "scan": ["scan", name],
        "scan --json": ["scan", name, "--json"],
        "swap --no-calibrate": ["swap", name, "--no-calibrate", "-o", "out.onnx"],
        "swap --calib": ["swap", name, "--calib", "calib.npz", "-o", "out.onnx"],
        "check": ["check", "orig.onnx", name, "--val", "val.npz"],
        "check orig": ["check", name, "cand.onnx", "--val", "val.npz"],
    }[command]
    command = "check" if command.startswith("check") else command
    return Case(id=f"m{index:05d}", kind="model", mutation=mutation, command=command, argv=argv,
                timeout=TIMEOUTS[command], gate=command == "check",
                output="out.onnx" if command.startswith("swap") else None, base=model)


def build_data_case(settings: Settings, index: int, work: Path) -> Case:
    rng = random.Random(f"{settings.seed}/data/{index}")
    model = rng.choice(MODELS)
    bases = _bases(settings)
    _copy_base(settings, work, model)
    shutil.copy(work / "orig.onnx", work / "model.onnx")
    command = rng.choices(("swap --calib", "check", "swap --calib --val"), (45, 35, 20))[0]
    source = bases["calib"] if command == "swap --calib" else bases["val"]
    ctx = fuzz_data.DataCtx(work=work, np_rng=np.random.default_rng(rng.getrandbits(64)),
                            bomb=Path(settings.base["dir"]) / "bomb.npz")
    mutation, path = fuzz_data.make_data_mutant(source, rng, ctx)
    data = os.path.relpath(path, work) if str(path).startswith(str(work)) else str(path)
    argv = {
        "swap --calib": ["swap", "model.onnx", "--calib", data, "-o", "out.onnx"],
        "check": ["check", "model.onnx", "cand.onnx", "--val", data],
        "swap --calib --val": ["swap", "model.onnx", "--calib", "calib.npz", "--val", data, "-o", "out.onnx"],
    }[command]
    return Case(id=f"d{index:05d}", kind="data", mutation=mutation, command=command, argv=argv,
                timeout=TIMEOUTS[command], gate=command != "swap --calib",
                output="out.onnx" if command.startswith("swap") else None, base=model)


def build_option_case(settings: Settings, name: str, work: Path) -> Case:
    spec = next(c for c in fuzz_options.CASES if c.name == name)
    base = Path(settings.base["dir"])
    _copy_base(settings, work, MODELS[0])
    shutil.copy(work / "orig.onnx", work / "model.onnx")
    shutil.copy(base / f"{MODELS[1]}.onnx", work / "other.onnx")
    if spec.setup is not None:
        spec.setup(work)
    fill = {"{model}": "model.onnx", "{calib}": "calib.npz", "{val}": "val.npz", "{cand}": "cand.onnx"}
    argv = [fill.get(a, a) for a in spec.argv]
    output = argv[argv.index("-o") + 1] if "-o" in argv else None
    return Case(id=f"o-{name}", kind="option", mutation=name, command=f"{argv[0]} (option)", argv=argv,
                timeout=spec.timeout, gate=spec.gate, data_loss=spec.data_loss, output=output,
                may_change=spec.may_change, base=MODELS[0])


def build_case(settings: Settings, case_id: str, work: Path) -> Case:
    if case_id.startswith("o-"):
        return build_option_case(settings, case_id[2:], work)
    builder = build_model_case if case_id.startswith("m") else build_data_case
    return builder(settings, int(case_id[1:]), work)


# ---------------------------------------------------------------- running and judging


def execute(case: Case, work: Path, launcher) -> dict:
    tmp = work / "tmp"
    tmp.mkdir(exist_ok=True)
    # the tool's own spill files land in TMPDIR, so leftovers are seen
    return launcher.run(case.argv, work, {"TMPDIR": str(tmp)}, case.timeout, tmp / ".stdout", tmp / ".stderr")


def run_case(settings: Settings, case_id: str, launcher) -> dict:
    """Build, run and judge one case in its own folder; keep the folder's inputs when it fails."""
    work = settings.root / case_id
    if work.exists():
        shutil.rmtree(work)
    work.mkdir(parents=True)
    try:
        case = build_case(settings, case_id, work)
    except Exception as exc:  # noqa: BLE001 - a mutant the generator could not write is skipped, not a finding
        shutil.rmtree(work, ignore_errors=True)
        return {"id": case_id, "class": "SKIPPED", "error": f"{type(exc).__name__}: {exc}"[:300]}
    before = snapshot(work)
    case.output_existed = bool(case.output) and os.path.lexists(work / case.output)
    run = execute(case, work, launcher)
    after = snapshot(work)
    verdict = classify(case, run, before, after, work)
    record = {**asdict(case), **verdict, "rc": run["rc"], "seconds": run["seconds"], "seed": settings.seed,
              "launch": settings.launch,
              "stderr_head": run["stderr"][-3000:] if verdict["class"] != "OK" else run["stderr"][:300],
              "stdout_tail": run["stdout"][-600:] if verdict["class"] != "OK" else ""}
    record["reproduce"] = f"python benchmarks/fuzz.py --seed {settings.seed} --only {case_id} --keep"
    if verdict["class"] != "OK" or verdict["notes"]:
        _keep_inputs(work, settings.out / "cases" / case_id, before, record)
    if not settings.keep:
        shutil.rmtree(work, ignore_errors=True)
    return record


def _keep_inputs(work: Path, dest: Path, before: dict, record: dict) -> None:
    """Copy the case's input files (small regular files and symlinks; FIFOs are recreated) for later study."""
    dest.mkdir(parents=True, exist_ok=True)
    for rel, what in before.items():
        src, dst = work / rel, dest / rel
        dst.parent.mkdir(parents=True, exist_ok=True)
        if what.startswith("link:"):
            if not os.path.lexists(dst):
                os.symlink(what[5:], dst)
        elif what.startswith("special:"):
            (dst.parent / (dst.name + ".was-special-file")).write_text(what)
        elif src.is_file() and src.stat().st_size < 16 << 20:
            shutil.copy(src, dst)
    (dest / "record.json").write_text(json.dumps(record, indent=2))


# ---------------------------------------------------------------- reporting


# ---------------------------------------------------------------- main


_SETTINGS: Settings | None = None
_LAUNCHER = None


def make_launcher(settings: Settings, kind: str):
    cls = fuzz_launch.ForkLauncher if kind == "fork" else fuzz_launch.ExecLauncher
    return cls(child_env(settings.root), settings.mem_bytes)


def _init_worker(settings: Settings) -> None:
    global _SETTINGS, _LAUNCHER
    _SETTINGS = settings
    _LAUNCHER = make_launcher(settings, settings.launch)


def _work(case_id: str) -> dict:
    return run_case(_SETTINGS, case_id, _LAUNCHER)


def confirm(settings: Settings, summary: dict, jobs: int) -> None:
    """Replay each distinct signature's example with a fresh interpreter (exec) and note whether it recurs."""
    exec_settings = Settings(**{**settings.__dict__, "launch": "exec", "out": settings.out / "confirm"})
    with ProcessPoolExecutor(jobs, initializer=_init_worker, initargs=(exec_settings,)) as pool:
        replays = dict(zip([s["example"] for s in summary["signatures"]],
                           pool.map(_work, [s["example"] for s in summary["signatures"]])))
    for s in summary["signatures"]:
        again = replays[s["example"]]
        s["exec_replay"] = {"class": again["class"], "same_signature": again.get("signature") == s["signature"],
                            "signature": again.get("signature", "")}


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--models", type=int, default=200, help="model mutants")
    p.add_argument("--data", type=int, default=50, help="data mutants")
    p.add_argument("--options", action=argparse.BooleanOptionalAction, default=True, help="run the option cases")
    p.add_argument("--jobs", type=int, default=2)
    p.add_argument("--out", type=Path, default=None, help="default reports/fuzz/<UTC time>/")
    p.add_argument("--mem-gib", type=float, default=4.0, help="address-space limit of each run")
    p.add_argument("--only", action="append", default=[], help="run just these case ids (m00012, d00003, o-NAME)")
    p.add_argument("--keep", action="store_true", help="keep every case folder (printed at the end)")
    p.add_argument("--launch", choices=("exec", "fork"), default="exec",
                   help="exec: a fresh interpreter per run; fork: one import per worker, a forked child per run")
    p.add_argument("--confirm", action="store_true", help="replay each distinct failure with exec at the end")
    args = p.parse_args(argv)
    started = datetime.now(timezone.utc).strftime("%Y%m%dT%H%M%SZ")
    out = args.out or ROOT / "reports" / "fuzz" / started
    out.mkdir(parents=True, exist_ok=True)
    root = Path(tempfile.mkdtemp(prefix="swapper-fuzz-"))
    settings = Settings(seed=args.seed, root=root, out=out, mem_bytes=int(args.mem_gib * 2**30), keep=args.keep,
                        launch=args.launch)
    t0 = time.monotonic()
    settings.base = prepare(root)
    ids = args.only or ([f"m{i:05d}" for i in range(args.models)] + [f"d{i:05d}" for i in range(args.data)]
                        + ([f"o-{c.name}" for c in fuzz_options.CASES] if args.options else []))
    random.Random(args.seed).shuffle(ids)  # mix slow and fast cases across workers
    records = []
    counts = collections.Counter()
    with open(out / "runs.jsonl", "w") as log, ProcessPoolExecutor(args.jobs, initializer=_init_worker,
                                                                   initargs=(settings,)) as pool:
        futures = [pool.submit(_work, i) for i in ids]
        try:
            for k, fut in enumerate(as_completed(futures), 1):
                rec = fut.result()
                records.append(rec)
                counts[rec["class"]] += 1
                log.write(json.dumps(rec) + "\n")
                log.flush()
                if k % 50 == 0 or k == len(ids) or args.only:
                    print(f"[{time.monotonic() - t0:6.0f}s] {k}/{len(ids)} " + " ".join(
                        f"{c}={n}" for c, n in sorted(counts.items())), file=sys.stderr, flush=True)
        except KeyboardInterrupt:
            for fut in futures:
                fut.cancel()
            print("interrupted: writing the summary of the runs so far", file=sys.stderr)
    config = {"seed": args.seed, "models": args.models, "data": args.data, "options": args.options,
              "jobs": args.jobs, "mem_gib": args.mem_gib, "started_utc": started, "only": args.only,
              "launch": args.launch, "wall_s": time.monotonic() - t0, "python": sys.version.split()[0],
              "repo": str(ROOT)}
    summary = summarise(records, config)
    if args.confirm and summary["signatures"]:
        print(f"replaying {len(summary['signatures'])} distinct failures with exec", file=sys.stderr)
        confirm(settings, summary, args.jobs)
    (out / "summary.json").write_text(json.dumps(summary, indent=2))
    (out / "digest.md").write_text(digest(summary))
    if args.only:
        for rec in records:
            print(json.dumps({k: rec.get(k) for k in ("id", "mutation", "command", "argv", "rc", "class", "notes",
                                                         "signature", "where")}, indent=1))
            print(rec.get("stderr_head", "")[-2000:])
    if args.keep:
        print(f"case folders kept under {root}", file=sys.stderr)
    else:
        shutil.rmtree(root, ignore_errors=True)
    print(f"results: {out}", file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())
