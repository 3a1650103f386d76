"""Run a simulator exported by mnemode with nothing but torch, numpy and the standard library.

Usage:
    python run_exported_simulator.py EXPORT_DIR --steps 100 --x0 1,2,45 --cold-start
    python run_exported_simulator.py EXPORT_DIR --steps 100 --history observed.csv --out forecast.csv
    python run_exported_simulator.py EXPORT_DIR --steps 100 --history observed.csv --forcing load.csv --out f.csv

It reads ``simulator.json`` (checking its HMAC-SHA256 signature with ``--key-file``),
checks each program's SHA-256, inspects each program archive and refuses any
entry that loading would unpickle (so a tampered file runs no code), loads
``simulator.pt2`` (and ``warm_up.pt2`` for a model with memory), warms the hidden
state up from an observed history (CSV with a ``time`` column and one column per
component, named as in the manifest; oldest row first), drives a forced
simulator with the forcing file (``time`` plus one column per forcing input,
linear between rows), gives each program the time of its interval's start when
its inputs (``programs.<role>.inputs`` in the manifest) begin with ``t`` (forced
simulators, and timed ones whose physics reads t: the clock is ``--t0``, or the
history's times), rolls the state forward and writes the trajectory in the
same CSV layout as ``mnemode rollout``. States leaving the training envelope are
reported on stderr; a state that turns non-finite stops the run.

The logic mirrors ``mnemode.simulator`` and ``mnemode.archive``; copy this file
next to your own code.
"""

from __future__ import annotations

import argparse
import csv
import hashlib
import hmac
import io
import json
import re
import sys
import zipfile
from pathlib import Path

import numpy as np
import torch

# -- archive inspection (a copy of mnemode.archive.archive_problem) ---------------------

_ALLOWED = re.compile(
    r"(archive_format|archive_version|byteorder|\.data/version|\.data/serialization_id"
    r"|models/\w+\.json|data/weights/\w+_weights_config\.json|data/constants/\w+_constants_config\.json"
    r"|data/weights/weight_\d+|data/constants/tensor_\d+|data/sample_inputs/\w+\.pt)")
_RAW = re.compile(r"data/(weights/weight|constants/tensor)_\d+")


def archive_problem(data: bytes):
    """What in a .pt2 archive would run code when loaded, or None when nothing would."""
    try:
        archive = zipfile.ZipFile(io.BytesIO(data))
        infos = archive.infolist()
    except (zipfile.BadZipFile, ValueError, OSError):
        return "it is not a zip archive"
    if len({i.filename.split("/", 1)[0] for i in infos}) != 1:
        return "it has more than one top-level folder"
    raw_entries, described = set(), set()
    for info in infos:
        name = info.filename.split("/", 1)[1] if "/" in info.filename else ""
        if info.is_dir():
            continue
        if not _ALLOWED.fullmatch(name):
            return f"it holds an unexpected entry {info.filename!r}"
        if name.startswith("data/sample_inputs/") and info.file_size:
            return f"its entry {info.filename!r} holds pickled sample inputs"
        if _RAW.fullmatch(name):
            raw_entries.add(name)
        if name.endswith("_config.json"):
            try:
                items = list(json.loads(archive.read(info).decode("utf-8"))["config"].items())
            except (ValueError, KeyError, TypeError, AttributeError, UnicodeDecodeError):
                return f"its entry {info.filename!r} is not a readable payload description"
            folder = name.rsplit("/", 1)[0]
            for key, meta in items:
                if not isinstance(meta, dict) or meta.get("use_pickle") is not False:
                    return f"its entry {info.filename!r} marks {key!r} as pickled"
                path = f"{folder}/{meta.get('path_name')}"
                if not _RAW.fullmatch(path):
                    return f"its entry {info.filename!r} points {key!r} at a non-tensor entry"
                described.add(path)
    if raw_entries - described:
        return "it holds tensor entries no description names"
    return None


def fail(what, problem: str, fix: str) -> None:
    sys.exit(f"{what}: {problem}. Fix: {fix}")


def load(export_dir: Path, name: str, manifest: dict):
    data = (export_dir / name).read_bytes()
    if hashlib.sha256(data).hexdigest() != manifest["files"][name]["sha256"]:
        fail(export_dir / name, "does not match the SHA-256 in simulator.json (modified or truncated)",
             "copy the export directory again")
    problem = archive_problem(data)
    if problem:
        fail(export_dir / name, f"refused before loading: {problem}, which loading would unpickle; the file "
             "may have been tampered with", "do not use it; obtain the export from its author again")
    return torch.export.load(io.BytesIO(data)).module()


# -- input files -------------------------------------------------------------------------

def numbers(text: str, n: int, what: str) -> list[float]:
    try:
        values = [float(v) for v in text.split(",")]
    except ValueError:
        values = []
    if len(values) != n:
        fail(what, f"{text!r} is not {n} comma-separated numbers", f"give {n} numbers")
    return values


def read_columns(path: Path, names: list[str]) -> np.ndarray:
    """Rows ``(N, 1 + len(names))`` of ``time`` and the named columns (one trajectory; '#' lines skipped)."""
    with open(path, newline="", encoding="utf-8") as fh:
        rows = list(csv.DictReader(line for line in fh if not line.startswith("#")))
    missing = [n for n in ["time", *names] if not rows or n not in rows[0]]
    if not rows or missing:
        fail(path, f"needs columns {['time', *names]} and at least two rows (missing: {missing})",
             "name the columns as in simulator.json")
    if len({r.get("trajectory", "0") for r in rows}) > 1:
        fail(path, "holds several trajectories", "give one trajectory (this script runs batch 1)")
    try:
        a = np.array([[float(r[n]) for n in ["time", *names]] for r in rows])
    except ValueError:
        fail(path, "holds a value that is not a number", "fix the file")
    if not np.isfinite(a).all():
        fail(path, "holds non-finite values", "fill the missing values")
    return a


# -- the run -------------------------------------------------------------------------------

def main(argv=None) -> None:
    p = argparse.ArgumentParser(description="Roll out a simulator exported by mnemode (torch only).")
    p.add_argument("export_dir", type=Path)
    p.add_argument("--steps", type=int, required=True, help="observation intervals to run")
    p.add_argument("--x0", help="initial observed state, comma-separated")
    p.add_argument("--t0", type=float, default=0.0,
                   help="time of --x0 (default 0); physics that reads t sees t0 + k*dt on step k")
    p.add_argument("--history", type=Path,
                   help="observed history CSV to warm the hidden state up from (warm_up_steps + 1 rows)")
    p.add_argument("--forcing", type=Path, help="forcing CSV (time + forcing columns) over history and forecast")
    p.add_argument("--cold-start", action="store_true", help="let a model with memory start without a warm-up")
    p.add_argument("--key-file", type=Path, help="verify the export's signature with this key")
    p.add_argument("--out", type=Path, help="write the trajectory to this CSV (never overwritten)")
    args = p.parse_args(argv)

    d = args.export_dir if args.export_dir.is_dir() else args.export_dir.parent
    raw = (d / "simulator.json").read_bytes()
    if args.key_file is not None:
        key = args.key_file.read_bytes().rstrip(b"\r\n")
        sig = d / "simulator.sig"
        want = hmac.new(key, raw, hashlib.sha256).hexdigest()
        if not sig.is_file() or not hmac.compare_digest(want, sig.read_text().strip()):
            fail(d / "simulator.json", "is unsigned or does not match its signature under this key; it may have "
                 "been tampered with", "do not use it; obtain the export from its author again")
    manifest = json.loads(raw.decode("utf-8"))
    state, dtype = manifest["state"], getattr(torch, manifest["dtype"])
    names, units, dim, hidden, dt = state["names"], state["units"], state["dim"], state["hidden_size"], manifest["time"]["dt"]
    forcing_rec = manifest.get("forcing") or {}
    fnames, funits = forcing_rec.get("names", []), forcing_rec.get("units", [])
    need = manifest["hidden_init"]["history_length"]
    if args.out is not None and args.out.exists():
        fail(args.out, "already exists", "choose another --out")
    step = load(d, manifest["programs"]["step"]["file"], manifest)

    # Start: the last history row (times continue from it) or --x0; memory needs a warm-up.
    hist = None
    if args.history is not None:
        hist = read_columns(args.history, names)
        if hidden and len(hist) < need and not args.cold_start:
            fail(args.history, f"has {len(hist)} rows; a full warm-up needs {need}", "give more rows or --cold-start")
        t0, x0 = hist[-1, 0], torch.tensor(hist[-1:, 1:], dtype=dtype)
        times = np.concatenate((hist[:, 0], t0 + dt * np.arange(1, args.steps + 1)))
    elif args.x0 is not None:
        if hidden and not args.cold_start:
            fail("--x0", "starts a model with memory without a warm-up", f"give --history ({need} rows) or --cold-start")
        t0, x0 = args.t0, torch.tensor([numbers(args.x0, dim, "--x0")], dtype=dtype)
        times = t0 + dt * np.arange(args.steps + 1)
    else:
        fail("rollout", "needs a starting point", "give --x0 or --history")
    if args.history is not None and args.x0 is not None:
        x0 = torch.tensor([numbers(args.x0, dim, "--x0")], dtype=dtype)
    u = None
    if fnames:
        if args.forcing is None:
            fail("rollout", f"this simulator is driven by {fnames}", "give --forcing FILE")
        f = read_columns(args.forcing, fnames)
        if times[0] < f[0, 0] - 1e-9 or times[-1] > f[-1, 0] + 1e-9:
            fail(args.forcing, f"covers {f[0, 0]:g} to {f[-1, 0]:g}, the run needs {times[0]:g} to {times[-1]:g}",
                 "give forcing over the whole history and forecast")
        u = torch.tensor(np.stack([np.interp(times, f[:, 0], f[:, 1 + j]) for j in range(len(fnames))], -1),
                         dtype=dtype)[:, None, :]

    def takes_t(role: str) -> bool:  # the signature the manifest records: (t, ...) or without t
        inputs = manifest["programs"][role].get("inputs")
        return "t" in inputs if inputs is not None else bool(fnames)

    def call(prog, role, t, *xs_and_u):
        return prog(torch.tensor(t, dtype=dtype), *xs_and_u) if takes_t(role) else prog(*xs_and_u)

    # Hidden state: the initial vector, then the warm-up program over the history.
    r = torch.tensor([manifest["hidden_init"]["initial_vector"] or []], dtype=dtype)
    if hist is not None and hidden:
        warm = load(d, manifest["programs"]["warm_up"]["file"], manifest)
        h = torch.tensor(hist[:, 1:], dtype=dtype)[:, None, :]
        with torch.no_grad():
            for k in range(len(hist) - 1):
                extra = () if u is None else (u[k], u[k + 1])
                r = call(warm, "warm_up", hist[k, 0], h[k], h[k + 1], r, *extra)
    base = 0 if hist is None else len(hist) - 1  # index of the start state in the forcing samples

    # Envelope guard: report the first excursion beyond margin × range.
    env, margin = manifest["envelope"]["components"], manifest["envelope"]["default_margin"]
    lo = torch.tensor([env[n][0] - margin * (env[n][1] - env[n][0]) for n in names], dtype=dtype)
    hi = torch.tensor([env[n][1] + margin * (env[n][1] - env[n][0]) for n in names], dtype=dtype)

    s = torch.cat((x0, r), dim=-1) if hidden else x0
    traj, warned = [s[0, :dim].tolist()], False
    with torch.no_grad():
        for k in range(1, args.steps + 1):
            extra = () if u is None else (u[base + k - 1], u[base + k])
            s = call(step, "step", times[base + k - 1], s, *extra)
            if not bool(torch.isfinite(s).all()):
                fail(f"rollout at step {k}", "the state became non-finite (the simulator blew up)",
                     "start inside the training envelope or shorten the rollout")
            x = s[0, :dim]
            traj.append(x.tolist())
            if not warned and bool(((x < lo) | (x > hi)).any()):
                print(f"warning: step {k}: state {x.tolist()} left the training envelope; "
                      "the learned correction is extrapolating", file=sys.stderr)
                warned = True

    if args.out is not None:
        # The CSV layout of `mnemode rollout`: units line, comment line, header, one row per time.
        fore_u = None if u is None else u[base:, 0].tolist()
        with open(args.out, "w", newline="", encoding="utf-8") as fh:
            fh.write("# units: " + ",".join([*units, *funits]) + "\n")
            fh.write(f"# mnemode exported simulator rollout: dt={dt!r} {manifest['time'].get('unit', '')}\n")
            fh.write(",".join(["trajectory", "time", *names, *fnames]) + "\n")
            for k, row in enumerate(traj):
                values = [*row, *(fore_u[k] if fore_u is not None else [])]
                fh.write(",".join(["0", repr(float(times[base + k]))] + [repr(float(v)) for v in values]) + "\n")
        print(f"wrote {len(traj)} states to {args.out}")
    print("final state: " + ", ".join(f"{n}={v:.10g}" for n, v in zip(names, traj[-1])))


if __name__ == "__main__":
    main()
