"""Summaries of a fuzz run: counts per class, kind and command, distinct failure signatures, traceback
locations and notes (summary.json), and the same as a markdown digest (digest.md)."""
from __future__ import annotations

import collections

from fuzz_judge import CLASSES


def summarise(records: list[dict], config: dict) -> dict:
    done = [r for r in records if r["class"] != "SKIPPED"]
    by_cmd = collections.defaultdict(collections.Counter)
    by_kind = collections.defaultdict(collections.Counter)
    for r in done:
        by_cmd[r["command"]][r["class"]] += 1
        by_kind[r["kind"]][r["class"]] += 1
    sigs: dict[str, dict] = {}
    for r in done:
        if r["class"] == "OK":
            continue
        s = sigs.setdefault(r["signature"], {"signature": r["signature"], "count": 0, "class": r["class"],
                                             "command": r["command"], "exc_type": r["exc_type"],
                                             "where": r["where"], "example": r["id"], "mutation": r["mutation"],
                                             "first_line": r["exc_line"] or _first_err(r), "mutations": set()})
        s["count"] += 1
        s["mutations"].add(r["mutation"].split("+")[0])
    locations = collections.Counter((r["exc_type"], r["where"]) for r in done if r["class"] == "TRACEBACK")
    notes = collections.Counter(n.split(":")[0] for r in done for n in r["notes"])
    note_examples = {}
    for r in done:
        for n in r["notes"]:
            note_examples.setdefault(n.split(":")[0], (r["id"], r["command"], r["mutation"], n))
    signatures = sorted(sigs.values(), key=lambda s: (-s["count"], s["signature"]))
    for s in signatures:
        s["mutations"] = sorted(s["mutations"])
    return {
        "config": config,
        "runs": len(done),
        "skipped": len(records) - len(done),
        "classes": dict(collections.Counter(r["class"] for r in done)),
        "by_kind": {k: dict(v) for k, v in by_kind.items()},
        "by_command": {k: dict(v) for k, v in sorted(by_cmd.items())},
        "signatures": signatures,
        "traceback_locations": [{"exc_type": e, "where": w, "count": c} for (e, w), c in locations.most_common()],
        "notes": dict(notes),
        "note_examples": {k: list(v) for k, v in note_examples.items()},
    }


def _first_err(r: dict) -> str:
    lines = [line for line in r.get("stderr_head", "").splitlines() if line.strip()]
    return lines[0][:200] if lines else ""


def digest(summary: dict) -> str:
    cfg = summary["config"]
    lines = [f"# swapper fuzz run {cfg['started_utc']}", "",
             f"seed {cfg['seed']}, {summary['runs']} runs ({summary['skipped']} mutants skipped: generator could"
             f" not write them), jobs {cfg['jobs']}, launcher {cfg['launch']}, memory limit {cfg['mem_gib']} GiB,"
             f" wall {cfg['wall_s']:.0f} s.",
             f"Replay one case: `python benchmarks/fuzz.py --seed {cfg['seed']} --only ID --keep`.", "",
             "## Classes per command", "", "| command | runs | " + " | ".join(CLASSES) + " |",
             "|---|---|" + "---|" * len(CLASSES)]
    for cmd, counts in summary["by_command"].items():
        lines.append(f"| {cmd} | {sum(counts.values())} | " + " | ".join(str(counts.get(c, 0)) for c in CLASSES)
                     + " |")
    total = summary["classes"]
    lines.append(f"| **all** | {summary['runs']} | " + " | ".join(str(total.get(c, 0)) for c in CLASSES) + " |")
    lines += ["", "## Distinct failure signatures (command | class | exception: first line)", "",
              "| # | count | signature | where (innermost swapper frame) | example (id, mutation) | exec replay |",
              "|---|---|---|---|---|---|"]
    for i, s in enumerate(summary["signatures"], 1):
        sig = s["signature"].replace("|", "\\|")
        replay = s.get("exec_replay")
        again = "-" if replay is None else ("same" if replay["same_signature"] else replay["class"])
        lines.append(f"| {i} | {s['count']} | {sig} | {s['where'] or '-'} | {s['example']} `{s['mutation']}` |"
                     f" {again} |")
    lines += ["", "## Traceback locations", "", "| exception | where | runs |", "|---|---|---|"]
    for loc in summary["traceback_locations"]:
        lines.append(f"| {loc['exc_type']} | {loc['where'] or '-'} | {loc['count']} |")
    lines += ["", "## Notes (softer promises, not counted as failures)", "", "| note | runs | example |",
              "|---|---|---|"]
    for note, count in sorted(summary["notes"].items(), key=lambda kv: -kv[1]):
        ex = summary["note_examples"][note]
        lines.append(f"| {note} | {count} | {ex[0]} ({ex[1]}, `{ex[2]}`): {ex[3][:120]} |")
    return "\n".join(lines) + "\n"
