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


def _log_to_file(exc: MnemodeError) -> None:
    """Put the error in the run's log file only: the console gets it once, from :func:`_fail`."""
    record = log.makeRecord(log.name, logging.ERROR, __file__, 0, "%s", (exc,), None)
    for logger in (log, logging.getLogger()):
        for handler in logger.handlers:
            if isinstance(handler, logging.FileHandler):
                handler.handle(record)


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
            _log_to_file(exc)
            _fail(exc)

    from .config_check import precheck_overrides

    precheck_overrides(command, rest)  # settings and run directory, before Hydra creates anything
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
                        ("simulator", run.export_dir / "simulator.pt2")):
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
    run = RunDir(path)
    if not run.is_run():  # checked before the writer lock, which would add a file
        run.load_config()
    return args, run


def _assess(rest: list[str]) -> None:
    from . import pipeline

    parser = argparse.ArgumentParser(prog="mnemode assess", description="Re-assess a run's fitted models.")
    parser.add_argument("run_dir")
    args, run = _run_dir_arg(parser, rest)
    with run.lock("assess"):
        pipeline.assess_run(run)
    _print_summary(run)


def _export(rest: list[str]) -> None:
    from . import pipeline

    parser = argparse.ArgumentParser(prog="mnemode export", description="Export a run's model as a frozen simulator.")
    parser.add_argument("run_dir")
    parser.add_argument("--model", default=None, help="which fitted model (default: the run's main model)")
    parser.add_argument("--onnx", action="store_true", default=None, help="also write simulator.onnx")
    parser.add_argument("--overwrite", action="store_true", help="replace an existing export of this run")
    args, run = _run_dir_arg(parser, rest)
    with run.lock("export"):
        manifest = pipeline.export_run(run, model_name=args.model, onnx=args.onnx, overwrite=args.overwrite)
    print(f"exported {manifest.get('model_name', '')} to {run.export_dir}")
    parity = manifest.get("parity", {})
    if parity:
        print(f"parity (exported vs eager): {parity}")
    print("Caution: valid only inside its training envelope; validate against independent measurements "
          "before any use in control, protection or safety decisions.")


def _resume(rest: list[str]) -> None:
    from . import pipeline
    from .rundir import RunDir

    parser = argparse.ArgumentParser(prog="mnemode resume",
                                     description="Continue an interrupted run, or the unfinished jobs of a sweep.")
    parser.add_argument("run_dir")
    parser.add_argument("overrides", nargs="*", metavar="key=value",
                        help="settings that leave the fit unchanged: assess.*, export.*, fit.lr, progress")
    args = parser.parse_args(rest)
    path = Path(args.run_dir)
    runs = [RunDir(path)] if RunDir(path).is_run() else sorted(
        (r for r in (RunDir(p.parent) for p in path.glob("*/config.yaml")) if r.is_run()), key=lambda r: str(r.path))
    if not runs:
        raise MnemodeError(str(path), "holds no mnemode run (no config.yaml here or one level below)",
                           "pass a run directory or a sweep directory.")
    for run in runs:
        if run.status().get("state") == "finished":
            note = " (the overrides were not applied: a finished run has nothing left to resume)" \
                if args.overrides else ""
            print(f"{run.path}: finished, skipped{note}")
            continue
        cfg = run.load_config()
        stages = tuple(run.status().get("stages_requested", ("fit", "assess", "export")))
        print(f"resuming {run.path}")
        with run.lock("resume"):
            cfg = _resume_config(run, cfg, args.overrides)
            pipeline.run_pipeline(cfg, run.path, resume=True, stages=stages)
        _print_summary(run)


def _resume_config(run, cfg, overrides: list[str]):
    """The stored config with a resume's accepted overrides, written back and recorded in the history."""
    from omegaconf import OmegaConf

    from .config_check import apply_overrides, resume_overrides
    from .fileio import write_text

    if not overrides:
        _check_stored(run, cfg)
        return cfg
    changes = resume_overrides(overrides, cfg)
    new = apply_overrides(cfg, changes)
    old = {k: OmegaConf.select(cfg, k) for k in changes}
    write_text(run.config_path, OmegaConf.to_yaml(new, resolve=True))
    run.record("resume overrides", changes={k: {"from": _plain(old[k]), "to": _plain(v)} for k, v in changes.items()})
    return new


def _check_stored(run, cfg) -> None:
    """Check a stored config before resuming; a bad resumable setting is answered with the resume that fixes it."""
    from .config_check import RESUME_SAFE, check_config
    from .errors import ConfigError

    try:
        check_config(cfg)
    except ConfigError as exc:
        if any(exc.what == p.rstrip(".") or (p.endswith(".") and exc.what.startswith(p)) for p in RESUME_SAFE):
            raise ConfigError(exc.what, f"{exc.problem} (in the run's stored config)",
                              f"{exc.fix or ''} Give the new value to the resume, e.g. "
                              f"`mnemode resume {run.path} {exc.what}=...`.".strip()) from None
        raise


def _plain(v):
    from omegaconf import OmegaConf

    return OmegaConf.to_container(v) if OmegaConf.is_config(v) else v


def _rollout(rest: list[str]) -> None:
    from .simulator import load_simulator, rollout_to_file

    parser = argparse.ArgumentParser(prog="mnemode rollout",
                                     description="Roll an exported simulator forward and write the trajectory.")
    parser.add_argument("simulator", help="export directory or its simulator.pt2 / simulator.json")
    parser.add_argument("--x0", default=None, help="initial observed state, comma-separated (e.g. 1.0,2.0,45)")
    parser.add_argument("--history", default=None,
                        help="observed history (.csv/.npz) to warm up the hidden state; x0 defaults to its last state")
    parser.add_argument("--steps", type=int, required=True, help="number of observation intervals")
    parser.add_argument("--out", required=True, help="output file, .csv or .npz (never overwritten)")
    parser.add_argument("--overwrite", action="store_true", help="replace --out if it exists")
    parser.add_argument("--on-envelope", choices=("warn", "error", "ignore"), default="warn",
                        help="what to do when the state leaves the training envelope")
    args = parser.parse_args(rest)
    sim = load_simulator(args.simulator, on_envelope=args.on_envelope)
    x0 = None
    if args.x0 is not None:
        try:
            x0 = [float(v) for v in args.x0.split(",")]
        except ValueError:
            raise MnemodeError("--x0", f"{args.x0!r} is not a comma-separated list of numbers",
                               f"give {len(sim.state_names)} numbers, e.g. --x0 1.0,2.0,3.0.") from None
    history = None
    if args.history is not None:
        from .data import load_trajectories

        history = load_trajectories(args.history, expected_dim=len(sim.state_names)).states
    if x0 is None and history is None:
        raise MnemodeError("rollout", "needs a starting point", "pass --x0 or --history.")
    out = rollout_to_file(sim, x0, args.steps, args.out, history=history, progress=True, overwrite=args.overwrite)
    print(f"wrote {args.steps + 1} states to {out}")


if __name__ == "__main__":  # pragma: no cover
    main()
