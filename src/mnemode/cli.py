"""The ``mnemode`` command.

Sub-commands that take configs (``run``, ``fit``, ``generate``, ``diagnose``) hand
their arguments to Hydra, so overrides (``system.wall_response_time=0.01``),
presets (``experiment=memoryless_regime``), ``--cfg job`` and multirun ``-m``
work as Hydra users expect. The others take a run directory or a simulator.
Every user-facing failure prints one line naming the thing, the problem and the
fix, and exits non-zero.
"""

from __future__ import annotations

import argparse
import logging
import sys
from pathlib import Path

from .errors import MnemodeError

__all__ = ["main"]

log = logging.getLogger("mnemode")

USAGE = """\
usage: mnemode <command> [arguments]

Learn what a physics model is missing; assess it; export a frozen simulator.

commands taking Hydra overrides (add -m for a sweep, --help for the config groups):
  run        the main job: data, fit the model and baselines, assess, export
  fit        data and fitting only; leaves a run directory with the fitted models
  generate   generate (and cache) the configured data set; prints where it went
  diagnose   does the missing term need memory? fits a memoryless correction and
             measures how much of what is left the recent history of x predicts

commands taking a path:
  assess RUN_DIR      re-assess a run's fitted models (never refits)
  export RUN_DIR      export a run's model as a frozen simulator
  resume RUN_DIR      continue an interrupted run (or every unfinished job of a sweep)
  rollout SIMULATOR   roll an exported simulator forward from a state or history

examples:
  mnemode run
  mnemode run experiment=memoryless_regime
  mnemode run -m system.wall_response_time=0.1,1.0 name=tau_sweep
  mnemode assess mnemode-runs/demo/2026-12-02_10-00-00
"""

HYDRA_COMMANDS = ("run", "fit", "generate", "diagnose")


def _fail(exc: MnemodeError) -> None:
    print(f"mnemode: error: {exc}", file=sys.stderr)
    sys.exit(exc.exit_code)


def main(argv: list[str] | None = None) -> None:
    argv = list(sys.argv[1:] if argv is None else argv)
    if not argv or argv[0] in ("-h", "--help", "help"):
        print(USAGE)
        return
    if argv[0] in ("--version", "version"):
        from . import __version__

        print(f"mnemode {__version__}")
        return
    command, rest = argv[0], argv[1:]
    try:
        if command in HYDRA_COMMANDS:
            _hydra(command, rest)
        elif command == "assess":
            _assess(rest)
        elif command == "export":
            _export(rest)
        elif command == "resume":
            _resume(rest)
        elif command == "rollout":
            _rollout(rest)
        else:
            print(f"mnemode: error: unknown command {command!r}. Fix: use one of "
                  f"{', '.join(HYDRA_COMMANDS + ('assess', 'export', 'resume', 'rollout'))}.", file=sys.stderr)
            sys.exit(2)
    except MnemodeError as exc:
        _fail(exc)
    except KeyboardInterrupt:
        print("mnemode: interrupted; a run can be continued with `mnemode resume RUN_DIR`.", file=sys.stderr)
        sys.exit(130)


# -- Hydra-driven commands ---------------------------------------------------------

def _hydra(command: str, rest: list[str]) -> None:
    import hydra

    from .configs_path import config_dir

    def task(cfg) -> None:
        from hydra.core.hydra_config import HydraConfig

        try:
            run_dir = Path(HydraConfig.get().runtime.output_dir)
            _dispatch(command, cfg, run_dir)
        except MnemodeError as exc:
            log.error("%s", exc)
            _fail(exc)

    saved = sys.argv
    sys.argv = [f"mnemode {command}", *rest]
    try:
        hydra.main(version_base=None, config_path=str(config_dir()), config_name="mnemode")(task)()
    finally:
        sys.argv = saved


def _dispatch(command: str, cfg, run_dir: Path) -> None:
    from . import pipeline

    if command == "generate":
        system = pipeline.make_system(cfg)
        data = pipeline.prepare_data(cfg, system, progress=bool(cfg.progress))
        print(f"data set for {system.name}: {data.train.n_trajectories} train, {data.val.n_trajectories} "
              f"validation, {data.test.n_trajectories} test trajectories at dt={data.dt}")
        print(f"written to: {data.source}")
        return
    if command == "diagnose":
        from .fitting.memory_diagnostic import memory_need

        system = pipeline.make_system(cfg)
        data = pipeline.prepare_data(cfg, system, progress=bool(cfg.progress))
        report = memory_need(data.train, data.val, system.nominal)
        print(_memory_report(report))
        return
    stages = ("fit",) if command == "fit" else ("fit", "assess", "export")
    run = pipeline.run_pipeline(cfg, run_dir, stages=stages)
    _print_summary(run)


def _memory_report(report: dict) -> str:
    advice = {
        "memory": "train a memory closure: closure=leaky_memory fit=trajectory "
                  "(or closure=filter_bank fit=readout_ridge for an answer in seconds)",
        "memoryless": "a memoryless closure suffices: closure=random_features fit=derivative "
                      "(fit=flow_map if the sampling is coarse)",
    }
    lines = [
        "Does the missing term need memory?",
        f"  best memoryless correction explains     {100 * report['memoryless_explained']:6.2f} % of the residual variance",
        f"  adding the recent history of x explains {100 * report['history_explained']:6.2f} %",
        f"  history explains {100 * report['remaining_explained']:.1f} % of what the memoryless fit leaves "
        f"(threshold {100 * report['threshold']:.0f} %)",
        f"  recommendation: {report['recommendation']} -> {advice.get(report['recommendation'], '')}",
    ]
    return "\n".join(lines)


def _print_summary(run) -> None:
    metrics = run.metrics()
    assessment = metrics.get("assessment")
    if assessment:
        from .assess.report import metrics_table

        print()
        print(metrics_table(assessment))
    else:
        for name, d in metrics.get("fit", {}).items():
            print(f"{name}: train error {d.get('train_error')}, validation error {d.get('val_error')}, "
                  f"{d.get('fit_seconds', 0):.1f} s")
    print()
    print(f"run directory: {run.path}")
    for label, path in (("report", run.path / "report.md"), ("figures", run.path / "figures"),
                        ("metrics", run.metrics_path), ("TensorBoard", run.tb_dir),
                        ("simulators", run.export_dir)):
        if path.exists():
            extra = f"   (tensorboard --logdir {path})" if label == "TensorBoard" else ""
            print(f"  {label + ':':<12}{path}{extra}")


# -- path commands -------------------------------------------------------------

def _run_dir_arg(parser: argparse.ArgumentParser, rest: list[str]):
    args = parser.parse_args(rest)
    from .rundir import RunDir

    path = Path(args.run_dir)
    if not path.is_dir():
        raise MnemodeError(str(path), "is not a directory", "pass a run directory printed by `mnemode run` or `mnemode fit`.")
    return args, RunDir(path)


def _assess(rest: list[str]) -> None:
    from . import pipeline

    parser = argparse.ArgumentParser(prog="mnemode assess", description="Re-assess a run's fitted models.")
    parser.add_argument("run_dir")
    args, run = _run_dir_arg(parser, rest)
    pipeline.assess_run(run)
    _print_summary(run)


def _export(rest: list[str]) -> None:
    from . import pipeline

    parser = argparse.ArgumentParser(
        prog="mnemode export",
        description="Export a fitted model of a run as a frozen simulator (programs + manifest, parity-checked). "
                    "Each model gets its own folder RUN_DIR/export/<model>; the run's main model is the default.",
        epilog="example: mnemode export runs/demo/2026-12-02_10-00-00 --model memoryless --key-file ~/.mnemode-key")
    parser.add_argument("run_dir")
    parser.add_argument("--model", default=None, help="which fitted model (default: the run's main model)")
    parser.add_argument("--out", default=None, help="export folder (default: RUN_DIR/export/<model>)")
    parser.add_argument("--onnx", action="store_true", default=None, help="also write simulator.onnx")
    parser.add_argument("--overwrite", action="store_true", help="replace an existing export in that folder")
    parser.add_argument("--key-file", default=None,
                        help="sign the export with the key in this file (HMAC-SHA256; default: the "
                             "MNEMODE_SIGNING_KEY variable when set)")
    args, run = _run_dir_arg(parser, rest)
    from .simulator import read_key

    key = read_key(args.key_file)
    manifest = pipeline.export_run(run, model_name=args.model, onnx=args.onnx, overwrite=args.overwrite,
                                   out_dir=args.out, key=key)
    name = manifest.get("model_name", "")
    where = args.out if args.out is not None else run.export_dir / name
    print(f"exported {name} to {where}" + (" (signed)" if key else ""))
    parity = manifest.get("parity", {})
    if parity:
        print(f"parity (exported vs eager): max abs difference {parity.get('max_abs_diff'):.3g} over "
              f"{parity.get('steps')} steps (required ≤ {parity.get('tolerance'):g})")
    print("Caution: valid only inside its training envelope; validate against independent measurements "
          "before any use in control, protection or safety decisions.")


def _resume(rest: list[str]) -> None:
    from . import pipeline
    from .rundir import RunDir

    parser = argparse.ArgumentParser(prog="mnemode resume",
                                     description="Continue an interrupted run, or the unfinished jobs of a sweep.")
    parser.add_argument("run_dir")
    args = parser.parse_args(rest)
    path = Path(args.run_dir)
    runs = [RunDir(path)] if (path / "config.yaml").exists() else sorted(
        (RunDir(p.parent) for p in path.glob("*/config.yaml")), key=lambda r: str(r.path))
    if not runs:
        raise MnemodeError(str(path), "holds no mnemode run (no config.yaml here or one level below)",
                           "pass a run directory or a sweep directory.")
    for run in runs:
        if run.status().get("state") == "finished":
            print(f"{run.path}: finished, skipped")
            continue
        cfg = run.load_config()
        stages = tuple(run.status().get("stages_requested", ("fit", "assess", "export")))
        print(f"resuming {run.path}")
        pipeline.run_pipeline(cfg, run.path, resume=True, stages=stages)
        _print_summary(run)


def _rollout(rest: list[str]) -> None:
    parser = argparse.ArgumentParser(
        prog="mnemode rollout",
        description="Roll an exported simulator forward and write the trajectory (CSV layout: docs/exported-simulator.md). "
                    "A model with memory starts from an observed --history of warm_up_steps + 1 rows "
                    "(hidden_init.history_length in the export's simulator.json); output times continue from "
                    "the history's last time.",
        epilog="example: mnemode rollout runs/demo/RUN/export --history observed.csv --steps 500 --out forecast.csv")
    parser.add_argument("simulator", help="export folder (RUN_DIR/export/<model>, or RUN_DIR/export for the "
                                          "default model) or its simulator.pt2 / simulator.json")
    parser.add_argument("--x0", default=None, help="initial observed state, comma-separated (e.g. 1.0,2.0,45)")
    parser.add_argument("--history", default=None,
                        help="observed history (.csv/.npz, oldest row first) to warm up the hidden state; "
                             "needs warm_up_steps + 1 rows; x0 defaults to its last state")
    parser.add_argument("--forcing", default=None,
                        help="forcing inputs of a forced simulator: CSV with a time column and one column per "
                             "input, covering the history and the forecast (linear between rows)")
    parser.add_argument("--steps", type=int, required=True, help="number of observation intervals")
    parser.add_argument("--t0", type=float, default=0.0, help="time of --x0 when there is no history (default 0)")
    parser.add_argument("--cold-start", action="store_true",
                        help="let a model with memory start without a full warm-up (its hidden state then "
                             "starts from the untrained initial vector)")
    parser.add_argument("--out", required=True, help="output file, .csv or .npz (never overwritten)")
    parser.add_argument("--overwrite", action="store_true", help="replace --out if it exists")
    parser.add_argument("--on-envelope", choices=("warn", "error", "ignore"), default="warn",
                        help="what to do when the state leaves the training envelope (a non-finite state "
                             "always stops the rollout)")
    parser.add_argument("--key-file", default=None,
                        help="verify the export's signature with the key in this file (default: the "
                             "MNEMODE_SIGNING_KEY variable when set)")
    args = parser.parse_args(rest)
    import numpy as np

    from .simulator import load_simulator, read_forcing, read_key, rollout_to_file

    sim = load_simulator(args.simulator, on_envelope=args.on_envelope, key=read_key(args.key_file))
    x0 = None
    if args.x0 is not None:
        try:
            x0 = [float(v) for v in args.x0.split(",")]
        except ValueError:
            raise MnemodeError("--x0", f"{args.x0!r} is not a comma-separated list of numbers",
                               f"give {len(sim.state_names)} numbers, e.g. --x0 1.0,2.0,3.0.") from None
    history, t0, times = None, float(args.t0), None
    if args.history is not None:
        from .data import load_trajectories

        kw = {"state_columns": list(sim.state_names)} if str(args.history).endswith(".csv") else {}
        hist = load_trajectories(args.history, expected_dim=len(sim.state_names), **kw)
        history, t0 = hist.states, float(hist.times[-1])
        if sim.hidden_size and hist.states.shape[0] < sim.history_length and not args.cold_start:
            raise MnemodeError(str(args.history), f"has {hist.states.shape[0]} rows per trajectory; a full warm-up "
                               f"of this model needs {sim.history_length} (warm_up_steps + 1)",
                               f"give at least {sim.history_length} observed rows, or pass --cold-start to accept "
                               "a hidden state that still remembers its start.")
        times = np.concatenate((hist.times, t0 + sim.dt * np.arange(1, args.steps + 1)))
    elif x0 is None:
        raise MnemodeError("rollout", "needs a starting point", "pass --x0 or --history.")
    else:
        if sim.hidden_size and not args.cold_start:
            raise MnemodeError("--x0", f"starts a model with memory ({sim.hidden_size} hidden components) without "
                               "a warm-up, so its hidden state would be the untrained initial vector",
                               f"pass --history with {sim.history_length} observed rows (warm_up_steps + 1), or "
                               "--cold-start to start cold knowingly.")
        times = t0 + sim.dt * np.arange(args.steps + 1)
    forcing = None
    if args.forcing is not None:
        if not sim.forced:
            raise MnemodeError("--forcing", "was given but this simulator is autonomous", "drop --forcing.")
        forcing = read_forcing(args.forcing, sim.forcing_names, times)
    elif sim.forced:
        raise MnemodeError("rollout", f"this simulator is driven by {', '.join(sim.forcing_names)}",
                           "pass --forcing FILE with a time column and those columns over the history and forecast.")
    if forcing is not None and history is not None and forcing.shape[1] not in (1, history.shape[1]):
        raise MnemodeError(str(args.forcing), f"holds {forcing.shape[1]} trajectories but the history has "
                           f"{history.shape[1]}", "give one forcing signal, or one per history trajectory.")
    import warnings

    with warnings.catch_warnings():
        if args.cold_start:  # a short history was accepted knowingly: no reminder
            warnings.filterwarnings("ignore", message="history has")
        out = rollout_to_file(sim, x0, args.steps, args.out, history=history, progress=True,
                              overwrite=args.overwrite, t0=t0, cold_start=args.cold_start,
                              forcing=None if forcing is None else forcing[:, 0] if forcing.shape[1] == 1 else forcing)
    print(f"wrote {args.steps + 1} states to {out}")


if __name__ == "__main__":  # pragma: no cover
    main()
