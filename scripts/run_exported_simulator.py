"""Run a simulator exported by mnemode with nothing but torch, numpy and the standard library.

Usage:
    python run_exported_simulator.py EXPORT_DIR --steps 100 --x0 1,2,45
    python run_exported_simulator.py EXPORT_DIR --steps 100 --history observed.csv --out forecast.csv

It reads ``simulator.json``, checks each program's SHA-256, loads ``simulator.pt2``
(and ``warm_up.pt2`` for a model with memory), warms the hidden state up from
an observed history when one is given (CSV with one column per component, named
as in the manifest; extra columns ignored; oldest row first), rolls the state
forward and prints the final observed state or writes the trajectory as CSV.
States leaving the training envelope are reported on stderr.

The logic mirrors ``mnemode.simulator``; copy this file next to your own code.
"""

from __future__ import annotations

import argparse
import csv
import hashlib
import io
import json
import sys
from pathlib import Path

import torch


def load(export_dir: Path, name: str, manifest: dict):
    data = (export_dir / name).read_bytes()
    if hashlib.sha256(data).hexdigest() != manifest["files"][name]["sha256"]:
        sys.exit(f"{export_dir / name}: does not match the SHA-256 in simulator.json (modified or truncated). "
                 "Fix: copy the export directory again.")
    return torch.export.load(io.BytesIO(data)).module()


def numbers(text: str, n: int, what: str) -> list[float]:
    try:
        values = [float(v) for v in text.split(",")]
    except ValueError:
        values = []
    if len(values) != n:
        sys.exit(f"{what}: {text!r} is not {n} comma-separated numbers.")
    return values


def read_history(path: Path, names: list[str]) -> list[list[float]]:
    with open(path, newline="", encoding="utf-8") as fh:
        rows = list(csv.DictReader(line for line in fh if not line.startswith("#")))
    missing = [n for n in names if rows and n not in rows[0]]
    if not rows or missing:
        sys.exit(f"{path}: needs columns {names} and at least two rows (missing: {missing}).")
    return [[float(r[n]) for n in names] for r in rows]


def main(argv=None) -> None:
    p = argparse.ArgumentParser(description="Roll out a simulator exported by mnemode (torch only).")
    p.add_argument("export_dir", type=Path)
    p.add_argument("--steps", type=int, required=True, help="observation intervals to run")
    p.add_argument("--x0", help="initial observed state, comma-separated")
    p.add_argument("--history", type=Path, help="observed history CSV to warm the hidden state up from")
    p.add_argument("--out", type=Path, help="write the trajectory to this CSV (never overwritten)")
    args = p.parse_args(argv)

    d = args.export_dir if args.export_dir.is_dir() else args.export_dir.parent
    manifest = json.loads((d / "simulator.json").read_text(encoding="utf-8"))
    state, dtype = manifest["state"], getattr(torch, manifest["dtype"])
    names, dim, hidden, dt = state["names"], state["dim"], state["hidden_size"], manifest["time"]["dt"]
    step = load(d, manifest["programs"]["step"]["file"], manifest)
    if args.out is not None and args.out.exists():
        sys.exit(f"{args.out}: already exists; choose another --out.")

    # Hidden state: the initial vector, then the warm-up program over the history.
    r = torch.tensor([manifest["hidden_init"]["initial_vector"] or []], dtype=dtype)
    x0 = None
    if args.history is not None:
        hist = torch.tensor(read_history(args.history, names), dtype=dtype)[:, None, :]
        if hidden:
            warm = load(d, manifest["programs"]["warm_up"]["file"], manifest)
            with torch.no_grad():
                for k in range(hist.shape[0] - 1):
                    r = warm(hist[k], hist[k + 1], r)
        x0 = hist[-1]
    if args.x0 is not None:
        x0 = torch.tensor([numbers(args.x0, dim, "--x0")], dtype=dtype)
    if x0 is None:
        sys.exit("give --x0 or --history.")

    # Envelope guard: report the first excursion beyond margin × range.
    env, margin = manifest["envelope"]["components"], manifest["envelope"]["default_margin"]
    lo = torch.tensor([env[n][0] - margin * (env[n][1] - env[n][0]) for n in names], dtype=dtype)
    hi = torch.tensor([env[n][1] + margin * (env[n][1] - env[n][0]) for n in names], dtype=dtype)

    s = torch.cat((x0, r), dim=-1) if hidden else x0
    traj, warned = [s[0, :dim].tolist()], False
    with torch.no_grad():
        for k in range(1, args.steps + 1):
            s = step(s)
            x = s[0, :dim]
            traj.append(x.tolist())
            if not warned and bool(((x < lo) | (x > hi) | ~torch.isfinite(x)).any()):
                print(f"warning: step {k}: state {x.tolist()} left the training envelope; "
                      "the learned correction is extrapolating", file=sys.stderr)
                warned = True

    if args.out is not None:
        with open(args.out, "w", newline="", encoding="utf-8") as fh:
            w = csv.writer(fh)
            w.writerow(["time", *names])
            for k, row in enumerate(traj):
                w.writerow([repr(k * dt), *(repr(v) for v in row)])
        print(f"wrote {len(traj)} states to {args.out}")
    print("final state: " + ", ".join(f"{n}={v:.10g}" for n, v in zip(names, traj[-1])))


if __name__ == "__main__":
    main()
