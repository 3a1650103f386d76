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
import functools
import logging
import sys
from pathlib import Path

from .errors import MnemodeError

__all__ = ["main"]

log = logging.getLogger("mnemode")

# Imports stay inside the handlers: `mnemode --help`, `--version` and every
# `<command> --help` answer without loading torch or Hydra.

HYDRA_COMMANDS = ("run", "fit", "generate", "diagnose")


def _fail(exc: MnemodeError) -> None:
    print(f"mnemode: error: {exc}", file=sys.stderr)
    sys.exit(exc.exit_code)


def _handlers() -> dict:
    """Command name -> handler taking the rest of the command line (add a command here)."""
    table = {name: functools.partial(_hydra, name) for name in HYDRA_COMMANDS}
    table.update(assess=_assess, export=_export, resume=_resume, rollout=_rollout, runs=_runs, correction=_correction,
                 study=_study)
    return table


def _log_to_file(exc: MnemodeError) -> None:
    """Put the error in the run's log file only: the console gets it once, from :func:`_fail`."""
    record = log.makeRecord(log.name, logging.ERROR, __file__, 0, "%s", (exc,), None)
    for logger in (log, logging.getLogger()):
        for handler in logger.handlers:
            if isinstance(handler, logging.FileHandler):
                handler.handle(record)


def main(argv: list[str] | None = None) -> None:
    argv = list(sys.argv[1:] if argv is None else argv)
    from .version import __version__

    if not argv or argv[0] in ("-h", "--help", "help"):
        from .command_help import overview

        print(overview(__version__), end="")
        return
    if argv[0] in ("--version", "version"):
        print(f"mnemode {__version__}")
        return
    command, rest = argv[0], argv[1:]
    from .reproducible import pin_math_library

    pin_math_library()  # before torch loads: runs with one seed repeat exactly
    handlers = _handlers()
    try:
        if command not in handlers:
            print(f"mnemode: error: unknown command {command!r}. Fix: use one of "
                  f"{', '.join(handlers)} (mnemode --help lists them).", file=sys.stderr)
            sys.exit(2)
        handlers[command](rest)
    except MnemodeError as exc:
        _fail(exc)
    except KeyboardInterrupt:
        print("mnemode: interrupted; a run can be continued with `mnemode resume RUN_DIR`.", file=sys.stderr)
        sys.exit(130)


# -- Hydra-driven commands ---------------------------------------------------------

def _hydra(command: str, rest: list[str]) -> None:
    from .command_help import config_command_help, is_help_request

    if is_help_request(rest):
        print(config_command_help(command, rest), end="")
        return
    import hydra

    from .configs_path import config_dir

    worker_dir = None
    if command in ("run", "fit"):
        from . import distributed

        if distributed.init_from_env() and not distributed.is_main():
            # a data-parallel worker writes nothing: its Hydra output goes to a scratch folder
            import tempfile

            worker_dir = tempfile.mkdtemp(prefix="mnemode-worker-")
            rest = [*rest, f"hydra.run.dir={worker_dir}", "hydra.job_logging.root.level=WARNING"]

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
            _log_to_file(exc)
            _fail(exc)

    from .config_check import precheck_overrides
    from .sweep import check_launcher

    check_launcher(rest)
    precheck_overrides(command, rest)  # settings and run directory, before Hydra creates anything
    saved = sys.argv
    sys.argv = [f"mnemode {command}", *rest]
    try:
        hydra.main(version_base=None, config_path=str(config_dir()), config_name="mnemode")(task)()
    finally:
        sys.argv = saved
        if worker_dir is not None:
            import shutil

            shutil.rmtree(worker_dir, ignore_errors=True)


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
        _diagnose(cfg, run_dir)
        return
    stages = ("fit",) if command == "fit" else ("fit", "assess", "export")
    from . import distributed

    if distributed.world_size() > 1:  # launched by torchrun: fit data-parallel in rank 0's run directory
        run_dir = Path(distributed.shared_value(str(run_dir)))
        if not distributed.is_main():
            pipeline.fit_worker(cfg, run_dir)
            distributed.finish()
            return
        run = pipeline.run_pipeline(cfg, run_dir, stages=stages)
        distributed.finish()
    else:
        run = pipeline.run_pipeline(cfg, run_dir, stages=stages)
    _print_summary(run)


def _diagnose(cfg, run_dir: Path) -> None:
    """Advice before fitting: the data's layout, the sampling interval, the need for memory."""
    import json

    from omegaconf import OmegaConf

    from . import pipeline
    from .fileio import atomic_path
    from .fitting.memory_diagnostic import memory_need
    from .fitting.sampling_diagnostic import sampling_advice, sampling_report

    system = pipeline.make_system(cfg)
    data = pipeline.prepare_data(cfg, system, progress=bool(cfg.progress), check_sampling=False)
    physics = system.nominal if cfg.model.get("physics", True) else None
    sampling = sampling_advice(data.train, physics)
    memory = memory_need(data.train, data.val, physics, targets=sampling["targets"])
    text = "\n\n".join([_data_report(data), sampling_report(sampling), _memory_report(memory, sampling)])
    result = {"data": {"source": data.source, "dt": data.dt, "layout": data.layout,
                       "n_train": data.train.n_trajectories, "n_val": data.val.n_trajectories,
                       "n_test": data.test.n_trajectories},
              "sampling": sampling, "memory": memory, "command": _advised_command(memory, sampling)}
    run_dir.mkdir(parents=True, exist_ok=True)
    for name, body in (("diagnosis.txt", text + "\n"), ("diagnosis.json", json.dumps(result, indent=2) + "\n"),
                       ("config.yaml", OmegaConf.to_yaml(cfg, resolve=True))):
        path = run_dir / name
        if path.exists():  # never overwrite what a user already has
            raise MnemodeError(str(path), "already exists", "run diagnose again (a new run directory) or move it.")
        with atomic_path(path) as tmp:
            Path(tmp).write_text(body, encoding="utf-8")
    print(text)
    print()
    print(f"diagnosis written to: {run_dir}")


def _data_report(data) -> str:
    lines = [f"Data: {data.source}",
             f"  sampling interval {data.dt:.10g}; {data.train.n_trajectories} train, {data.val.n_trajectories} "
             f"validation, {data.test.n_trajectories} test trajectories (pieces)"]
    layout = data.layout or {}
    for split in ("train", "val", "test"):
        d = layout.get(split)
        if d:
            lines.append(f"  {split}: {d['trajectories']} trajectories, {d['segments']} segments, {d['samples']} "
                         f"samples, packed into {d['pieces']} pieces of {d['piece_length']} samples")
    if layout:
        lines.append(f"  {layout.get('gaps', 0)} gap(s); {layout.get('dropped_segments', 0)} short segment(s) "
                     f"dropped ({layout.get('dropped_samples', 0)} samples)")
    return "\n".join(lines)


def _advised_command(memory: dict, sampling: dict) -> str:
    """The options to fit what the diagnosis recommends."""
    coarse = sampling.get("targets") == "flow_map"
    if memory.get("recommendation") == "memory":
        return ("closure=gru_flow model=discrete fit=trajectory" if coarse else
                "closure=recurrent_leaky fit=trajectory (or closure=reservoir_filter_bank fit=readout_ridge for an "
                "answer in seconds)")
    return ("closure=random_features fit=flow_map model=discrete" if coarse else
            "closure=random_features fit=derivative")


def _memory_report(report: dict, sampling: dict | None = None) -> str:
    targets = report.get("targets", "derivative")
    lines = [
        "Does the missing term need memory?" + ("  (flow-map residuals: the sampling is coarse)"
                                                 if targets == "flow_map" else ""),
        f"  best memoryless correction explains     {100 * report['memoryless_explained']:6.2f} % of the residual variance",
        f"  adding the recent history of x explains {100 * report['history_explained']:6.2f} %",
        f"  history explains {100 * report['remaining_explained']:.1f} % of what the memoryless fit leaves "
        f"(threshold {100 * report['threshold']:.0f} %)",
        f"  recommendation: {report['recommendation']} -> {_advised_command(report, sampling or {})}",
    ]
    return "\n".join(lines)


def _fmt(v) -> str:
    return f"{v:.4g}" if isinstance(v, (int, float)) else str(v)


def _print_summary(run) -> None:
    metrics = run.metrics()
    assessment = metrics.get("assessment")
    if assessment:
        from .assess.report import metrics_table

        print()
        print(metrics_table(assessment))
    else:
        from .metric_labels import fit_error_label

        timing = metrics.get("timing", {}).get("fit", {})
        for name, d in metrics.get("fit", {}).items():
            secs = timing.get(name, {}).get("fit_seconds", d.get("fit_seconds", 0.0))
            print(f"{name} ({d.get('closure')} by {d.get('fitter')}, {secs:.1f} s): "
                  f"train error {_fmt(d.get('train_error'))}, validation error {_fmt(d.get('val_error'))}")
            print(f"    train error: {fit_error_label(d.get('fitter'), 'train_error', d)}")
    print()
    print(f"run directory: {run.path}")
    for label, path in (("report", run.path / "report.md"), ("figures", run.path / "figures"),
                        ("metrics", run.metrics_path), ("TensorBoard", run.tb_dir),
                        ("simulators", run.export_dir)):
        if path.exists():
            extra = f"   (tensorboard --logdir {path})" if label == "TensorBoard" else ""
            print(f"  {label + ':':<12}{path}{extra}")


# -- path commands -------------------------------------------------------------

_LISTS_MODELS = ("assess", "export", "resume", "correction")


def _parser(command: str, rest: list[str]) -> argparse.ArgumentParser:
    """The command's parser: its description and example from :mod:`mnemode.command_help`.

    For commands taking a run directory, ``--help`` after a run directory also lists
    that run's models.
    """
    from .command_help import COMMAND_DOCS, is_help_request

    doc = COMMAND_DOCS[command]
    epilog = f"example:\n  {doc.example}\n"
    if command in _LISTS_MODELS and is_help_request(rest):
        from .run_index import model_listing

        given = next((a for a in rest if not a.startswith("-") and Path(a).is_dir()), None)
        epilog += "\n" + (model_listing(given) if given else
                          f"models: `mnemode {command} RUN_DIR --help` lists a run's models; "
                          "`mnemode runs` lists the runs.\n")
    return argparse.ArgumentParser(prog=f"mnemode {command}", description=doc.description, epilog=epilog,
                                   formatter_class=argparse.RawDescriptionHelpFormatter)

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
    parser = _parser("assess", rest)
    parser.add_argument("run_dir", help="a run directory printed by `mnemode run` or `mnemode fit`")
    parser.add_argument("overrides", nargs="*", metavar="assess.KEY=VALUE",
                        help="assessment settings for this assessment, e.g. assess.horizon=40 assess.n_starts=100")
    args, run = _run_dir_arg(parser, rest)
    from . import pipeline

    cfg = _with_assess_overrides(run.load_config(), args.overrides)
    with run.lock("assess"):
        pipeline.assess_run(run, cfg)
    _print_summary(run)


def _with_assess_overrides(cfg, overrides: list[str]):
    """The run's config with ``assess.KEY=VALUE`` overrides applied (the run's config.yaml is left as it is)."""
    from omegaconf import OmegaConf

    from .assess import AssessSettings
    from .errors import ConfigError

    allowed = AssessSettings.config_keys()
    for item in overrides:
        key, sep, _ = item.partition("=")
        name = key.removeprefix("assess.")
        if not sep or not key.startswith("assess.") or name not in allowed:
            raise ConfigError(item, "is not an assessment setting override",
                              f"write assess.KEY=VALUE with KEY one of: {', '.join(allowed)}.")
    if not overrides:
        return cfg
    merged = OmegaConf.merge(cfg, OmegaConf.from_dotlist(list(overrides)))
    log.info("assessing with overrides: %s", " ".join(overrides))
    return merged


def _export(rest: list[str]) -> None:
    parser = _parser("export", rest)
    parser.add_argument("run_dir", help="a run directory printed by `mnemode run` or `mnemode fit`")
    parser.add_argument("--model", default=None, help="which fitted model (default: the run's main model)")
    parser.add_argument("--out", default=None, help="export folder (default: RUN_DIR/export/<model>)")
    parser.add_argument("--onnx", action="store_true", default=None, help="also write simulator.onnx")
    parser.add_argument("--compiled", action="store_true", default=None,
                        help="also compile the programs ahead of time into native packages (needs a C++ "
                             "compiler; load them with load_simulator(..., compiled=True))")
    parser.add_argument("--overwrite", action="store_true", help="replace an existing export in that folder")
    parser.add_argument("--key-file", default=None,
                        help="sign the export with the key in this file (HMAC-SHA256; default: the "
                             "MNEMODE_SIGNING_KEY variable when set)")
    args, run = _run_dir_arg(parser, rest)
    from . import pipeline
    from .simulator import read_key

    key = read_key(args.key_file)
    with run.lock("export"):
        manifest = pipeline.export_run(run, model_name=args.model, onnx=args.onnx, overwrite=args.overwrite,
                                       out_dir=args.out, key=key, compiled=args.compiled)
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
    parser = _parser("resume", rest)
    parser.add_argument("run_dir", help="a run directory, or a sweep directory (its unfinished jobs)")
    parser.add_argument("overrides", nargs="*", metavar="key=value",
                        help="settings that leave the fit unchanged: assess.*, export.*, fit.lr, progress")
    args = parser.parse_args(rest)
    from . import pipeline
    from .rundir import RunDir

    path = Path(args.run_dir)
    if RunDir(path).is_run():
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
        runs = [RunDir(j.path) for j in jobs if j.config is not None and RunDir(j.path).is_run()]
        if not runs:
            raise MnemodeError(str(path), "holds no mnemode run (no run directory here or one level below)",
                               "pass a run directory or a sweep directory; a sweep whose jobs never started "
                               "has nothing to resume (run it again).")
    failed = []
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
        error = MnemodeError(str(path), f"{len(failed)} of {len(runs)} jobs failed again "
                             f"({', '.join(r.path.name for r, _ in failed)}); each job's reason is above and in "
                             "its status.json", f"fix their cause and run `mnemode resume {path}` again, "
                             f"or see `mnemode study {path}`.")
        error.exit_code = getattr(worst, "exit_code", error.exit_code)
        raise error


def _study(rest: list[str]) -> None:
    parser = _parser("study", rest)
    parser.add_argument("dirs", nargs="+", help="sweep directories and/or run directories")
    parser.add_argument("--out", default=None, help="where to write (default: FIRST_DIR/study)")
    parser.add_argument("--overwrite", action="store_true", help="replace an earlier summary there")
    args = parser.parse_args(rest)
    from .study import summarise

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
    parser = _parser("rollout", rest)
    parser.add_argument("simulator", help="export directory or its simulator.pt2 / simulator.json")
    parser.add_argument("--x0", default=None, help="initial observed state, comma-separated (e.g. 1.0,2.0,45)")
    parser.add_argument("--history", default=None,
                        help="observed history (.csv/.npz, oldest row first) to warm up the hidden state; "
                             "needs warm_up_steps + 1 rows; x0 defaults to its last state")
    parser.add_argument("--forcing", default=None,
                        help="forcing inputs of a forced simulator: CSV with a time column and one column per "
                             "input, covering the history and the forecast (linear between rows)")
    parser.add_argument("--steps", type=int, required=True, help="number of observation intervals")
    parser.add_argument("--t0", type=float, default=0.0,
                        help="time of --x0 when there is no history (default 0); the physics of a forced "
                             "simulator, or of one whose physics reads t, sees t0 + k·Δt on step k (with "
                             "--history, t0 is its last true time)")
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
        hist_times = _history_times(hist, sim, args.history)
        history, t0 = hist.states, float(hist_times[-1])
        if sim.hidden_size and hist.states.shape[0] < sim.history_length and not args.cold_start:
            raise MnemodeError(str(args.history), f"has {hist.states.shape[0]} rows per trajectory; a full warm-up "
                               f"of this model needs {sim.history_length} (warm_up_steps + 1)",
                               f"give at least {sim.history_length} observed rows, or pass --cold-start to accept "
                               "a hidden state that still remembers its start.")
        times = np.concatenate((hist_times, t0 + sim.dt * np.arange(1, args.steps + 1)))
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


def _history_times(hist, sim, path):
    """The history's true times, one clock for all its trajectories (the simulator's ``t0`` is one float).

    A history whose trajectories keep different start times (``.npz`` with ``start_times``)
    is refused for a simulator whose programs take ``t``; an autonomous one runs on the
    history's own grid, as the times only label its output.
    """
    import numpy as np

    absolute = hist.absolute_times()
    if np.all(absolute == absolute[:, :1]):
        return absolute[:, 0]
    if sim.forced or sim.timed:
        raise MnemodeError(str(path), "holds trajectories at different true times (its start_times differ), but "
                           "this simulator's physics runs on one clock for the whole batch",
                           "roll out trajectories with different start times one call at a time (one trajectory "
                           "per history file).")
    return hist.times


def _correction(rest: list[str]) -> None:
    parser = _parser("correction", rest)
    parser.add_argument("run_dir", help="a run directory printed by `mnemode run` or `mnemode fit`")
    parser.add_argument("--model", default=None, help="which fitted model (default: the run's main model)")
    parser.add_argument("--degree", type=int, default=2, help="highest degree of the polynomial surrogate")
    parser.add_argument("--threshold", type=float, default=0.01,
                        help="drop surrogate terms contributing less than this fraction of their component")
    parser.add_argument("--overwrite", action="store_true", help="replace an earlier reading of this model")
    args, run = _run_dir_arg(parser, rest)
    from .explain import explain_run

    reading, path = explain_run(run.path, args.model, overwrite=args.overwrite, degree=args.degree,
                                threshold=args.threshold)
    print("\n".join(reading.surrogate.equations()))
    if reading.equivalent is not None:
        print("equivalent vector-field term:")
        print("\n".join(reading.equivalent.fit.equations()))
    print(f"report: {path}")

def _runs(rest: list[str]) -> None:
    parser = _parser("runs", rest)
    parser.add_argument("root", nargs="?", default=None,
                        help="a folder of runs, a sweep or one run (default: $MNEMODE_RUNS or ./mnemode-runs)")
    parser.add_argument("--json", action="store_true", help="print the summaries as JSON")
    args = parser.parse_args(rest)
    from .run_index import default_runs_root, find_runs, runs_json, runs_table, summarise_run

    root = Path(args.root) if args.root else default_runs_root()
    if not root.is_dir():
        raise MnemodeError(str(root), "is not a directory", "pass the folder your runs went to "
                           "(runs_root, $MNEMODE_RUNS, or ./mnemode-runs by default).")
    summaries = [summarise_run(p) for p in find_runs(root)]
    print(runs_json(summaries) if args.json else runs_table(summaries, root), end="")


if __name__ == "__main__":  # pragma: no cover
    main()
