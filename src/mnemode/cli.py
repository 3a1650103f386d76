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
  study SWEEP_DIR     one table and plots of a sweep's (or several runs') metrics
  rollout SIMULATOR   roll an exported simulator forward from a state or history

examples:
  mnemode run
  mnemode run experiment=memoryless_regime
  mnemode run -m system.wall_response_time=0.1,1.0 name=tau_sweep
  mnemode assess mnemode-runs/demo/2026-12-02_10-00-00
  mnemode run -m experiment=study_scale_separation hydra/launcher=workstation
  mnemode study mnemode-runs/study_scale_separation/sweep_2026-12-02_10-00-00
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
        elif command == "study":
            _study(rest)
        else:
            print(f"mnemode: error: unknown command {command!r}. Fix: use one of "
                  f"{', '.join(HYDRA_COMMANDS + ('assess', 'export', 'resume', 'rollout', 'study'))}.", file=sys.stderr)
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
        except Exception as exc:
            from .sweep import failure_recorded, in_sweep

            if in_sweep():  # Hydra goes on with the other jobs
                log.error("%s", exc, exc_info=not isinstance(exc, MnemodeError))
                if failure_recorded(run_dir, exc):
                    return  # in the job's status.json; the end-of-sweep report lists it and exits non-zero
                raise  # not recorded (e.g. a refusal to write over a run): Hydra raises it when the sweep ends
            if not isinstance(exc, MnemodeError):
                raise
            log.error("%s", exc)
            _fail(exc)

    from .sweep import check_launcher

    check_launcher(rest)
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

    parser = argparse.ArgumentParser(prog="mnemode export", description="Export a run's model as a frozen simulator.")
    parser.add_argument("run_dir")
    parser.add_argument("--model", default=None, help="which fitted model (default: the run's main model)")
    parser.add_argument("--onnx", action="store_true", default=None, help="also write simulator.onnx")
    parser.add_argument("--overwrite", action="store_true", help="replace an existing export of this run")
    args, run = _run_dir_arg(parser, rest)
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
    args = parser.parse_args(rest)
    path = Path(args.run_dir)
    if (path / "config.yaml").exists():
        runs = [RunDir(path)]
    else:
        from .study import read_jobs

        try:
            jobs = read_jobs([path])
        except MnemodeError:
            raise MnemodeError(str(path), "holds no mnemode run (no config.yaml here or one level below)",
                               "pass a run directory or a sweep directory.") from None
        for job in jobs:
            if job.config is None:
                print(f"{job.path}: no config.yaml, cannot be resumed ({job.reason})")
        runs = [RunDir(j.path) for j in jobs if j.config is not None]
        if not runs:
            raise MnemodeError(str(path), "holds no job that started a run (no config.yaml one level below)",
                               "run the sweep again; there is nothing here to resume.")
    failed = []
    for run in runs:
        if run.status().get("state") == "finished":
            print(f"{run.path}: finished, skipped")
            continue
        cfg = run.load_config()
        stages = tuple(run.status().get("stages_requested", ("fit", "assess", "export")))
        print(f"resuming {run.path}")
        if len(runs) == 1:
            pipeline.run_pipeline(cfg, run.path, resume=True, stages=stages)
        else:  # one job's failure is recorded in its status.json; the other jobs go on
            try:
                pipeline.run_pipeline(cfg, run.path, resume=True, stages=stages)
            except Exception as exc:  # noqa: BLE001 -- run_pipeline recorded it in the job's status.json
                print(f"{run.path}: failed: {exc or type(exc).__name__}", file=sys.stderr)
                failed.append((run, exc))
                continue
        _print_summary(run)
    if failed:
        worst = max(failed, key=lambda f: getattr(f[1], "exit_code", 1))[1]
        raise (type(worst) if isinstance(worst, MnemodeError) else MnemodeError)(str(path), f"{len(failed)} of {len(runs)} jobs failed again "
                          f"({', '.join(r.path.name for r, _ in failed)}); each job's reason is above and in "
                          "its status.json", f"fix their cause and run `mnemode resume {path}` again, "
                          f"or see `mnemode study {path}`.")


def _study(rest: list[str]) -> None:
    from .study import summarise

    parser = argparse.ArgumentParser(
        prog="mnemode study",
        description="Summarise a sweep (or several run directories): one table of each job's settings, status "
                    "and headline metrics per model, and plots of each metric against each swept parameter.")
    parser.add_argument("dirs", nargs="+", help="sweep directories and/or run directories")
    parser.add_argument("--out", default=None, help="where to write (default: FIRST_DIR/study)")
    parser.add_argument("--overwrite", action="store_true", help="replace an earlier summary there")
    args = parser.parse_args(rest)
    summary = summarise(args.dirs, args.out, overwrite=args.overwrite)
    jobs = summary.jobs
    done = sum(j.finished for j in jobs)
    print(f"{len(jobs)} jobs: {done} finished, {len(jobs) - done} not; swept: "
          f"{', '.join(summary.parameters) or 'nothing'}")
    for job in jobs:
        if not job.finished:
            print(f"  {job.name}: {job.state}: {job.reason}")
    print(f"table:   {summary.table_md}")
    print(f"         {summary.table_csv}")
    print(f"figures: {len(summary.figures)} in {summary.table_md.parent / 'figures'}")


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
