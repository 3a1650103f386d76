"""Help screens of the ``mnemode`` commands: what each does, its arguments, an example, its settings.

A config-taking command's help lists, after its description, the config groups it
uses with every option of each (its one-line description from the option file's
header comment), then the settings of the chosen option with the meaning of each
(from the comment on its line). ``mnemode run --help closure=recurrent_tanh`` shows
the settings of that option instead of the default. Everything is read from the
config files as text (:mod:`mnemode.config_docs`), so help never imports torch or Hydra.
"""

from __future__ import annotations

import re
import textwrap
from dataclasses import dataclass

from .config_docs import ConfigDoc, config_root, default_choices, group_options, read_config_doc

__all__ = ["CommandDoc", "COMMAND_DOCS", "config_command_help", "overview", "is_help_request"]

WIDTH = 100
HELP_FLAGS = ("-h", "--help")


@dataclass(frozen=True)
class CommandDoc:
    """What a command does, how it is called, its arguments and one example."""

    name: str
    summary: str                          # one line, for the command list
    description: str                      # what it does, in a few sentences
    usage: str
    arguments: tuple[tuple[str, str], ...]
    example: str
    groups: tuple[str, ...] = ()          # config groups it reads (config-taking commands)


_OVERRIDE_ARGS = (
    ("GROUP=OPTION", "choose a config group's option, e.g. closure=recurrent_tanh or experiment=tiny"),
    ("KEY=VALUE", "change one setting, e.g. fit.steps=100 or system.wall_response_time=0.01"),
    ("-m, --multirun", "sweep: comma-separated values run one job each (name=... names the sweep)"),
    ("--cfg job", "print the composed config and stop"),
    ("--hydra-help", "the options of Hydra, the config system behind these commands"),
    ("-h, --help", "this screen; with GROUP=OPTION arguments it shows those options' settings"),
)

COMMAND_DOCS: dict[str, CommandDoc] = {d.name: d for d in (
    CommandDoc(
        "run", "the main job: data, fit the main model and the models compared with it, assess, export",
        "Generate (or load) the data, fit the main model and the models compared with it, assess every model against "
        "the physics alone and the oracle on held-out test trajectories (validity time, invariant-measure "
        "KL, autocorrelation), and export the main model as a frozen simulator. Everything goes into one "
        "new run directory, runs_root/name/<date_time>, printed at the end; a run is never overwritten.",
        "mnemode run [GROUP=OPTION ...] [KEY=VALUE ...] [-m]", _OVERRIDE_ARGS,
        "mnemode run experiment=memoryless_regime fit.steps=200",
        ("system", "data", "closure", "fit", "model", "solver", "compare", "assess", "export", "experiment")),
    CommandDoc(
        "fit", "data and fitting only; leaves a run directory with the fitted models",
        "Generate (or load) the data and fit the main model and the models compared with it, nothing more. The run "
        "directory holds the fitted models, checkpoints and TensorBoard curves; `mnemode assess RUN_DIR` "
        "and `mnemode export RUN_DIR` finish it later.",
        "mnemode fit [GROUP=OPTION ...] [KEY=VALUE ...] [-m]", _OVERRIDE_ARGS,
        "mnemode fit closure=recurrent_tanh fit.steps=500 name=tanh_try",
        ("system", "data", "closure", "fit", "model", "solver", "compare", "experiment")),
    CommandDoc(
        "generate", "generate (and cache) the configured data set; prints where it went",
        "Generate the configured data set from the system's truth equations (or load the configured "
        "file), validate it, split it into training, validation and test trajectories and cache it. "
        "Later runs with the same system and data settings reuse the cache.",
        "mnemode generate [GROUP=OPTION ...] [KEY=VALUE ...]", _OVERRIDE_ARGS,
        "mnemode generate system.wall_response_time=0.01 data.n_train=20",
        ("system", "data", "experiment")),
    CommandDoc(
        "diagnose", "does the missing term need memory? (a regression test in seconds)",
        "Does the missing term need memory? Fits the best memoryless correction m(x) to the residual "
        "ẋ̂ − f0(x) of the training data and measures how much of what it leaves the recent history of x "
        "explains; prints the two shares and a recommendation (a memory closure, or a memoryless one).",
        "mnemode diagnose [GROUP=OPTION ...] [KEY=VALUE ...]", _OVERRIDE_ARGS,
        "mnemode diagnose experiment=memoryless_regime",
        ("system", "data", "experiment")),
    CommandDoc(
        "assess", "re-assess a run's fitted models (never refits)",
        "Score every fitted model of a run again on the run's own test data, next to the physics-only "
        "model and the oracle: metrics.json, report.md and figures/ are rewritten, the models are not.",
        "mnemode assess RUN_DIR", (("RUN_DIR", "a run directory printed by `mnemode run` or `mnemode fit`"),),
        "mnemode assess mnemode-runs/demo/2026-12-02_10-00-00"),
    CommandDoc(
        "export", "export a run's model as a frozen simulator",
        "Write a fitted model of a run as a frozen simulator (torch.export programs and a JSON manifest "
        "with state names, units, Δt, forcing inputs, training envelope and metrics) that loads with plain "
        "torch. Each model gets its own folder RUN_DIR/export/<model> (the main model is the default of "
        "RUN_DIR/export), or --out DIR; --key-file signs it. Validate it before use: it is not valid outside "
        "its training envelope (docs/exported-simulator.md).",
        "mnemode export RUN_DIR [--model NAME] [--out DIR] [--key-file KEY] [--onnx] [--overwrite]", (),
        "mnemode export mnemode-runs/demo/2026-12-02_10-00-00 --model memoryless"),
    CommandDoc(
        "resume", "continue an interrupted run (or every unfinished job of a sweep)",
        "Continue a run that was stopped or crashed from its last checkpoint: finished stages and fitted "
        "models are kept, the rest is done. Given a sweep directory, every unfinished job is continued.",
        "mnemode resume RUN_DIR", (),
        "mnemode resume mnemode-runs/demo/2026-12-02_10-00-00"),
    CommandDoc(
        "rollout", "roll an exported simulator forward from a state or history",
        "Load an exported simulator (plain torch; the archive is inspected before loading and its hashes and, "
        "when a key is given, its signature checked) and roll it forward. A model with memory starts from an "
        "observed --history of warm_up_steps + 1 rows (hidden_init.history_length in the export's "
        "simulator.json), or from --x0 only with --cold-start; a forced simulator takes --forcing covering "
        "the history and the forecast. Output times continue from the history's last true time (or --t0 with "
        "--x0), which is also the clock a forced simulator's physics, or one whose physics reads t, runs on; "
        "the CSV layout is the one every mnemode writer uses (docs/exported-simulator.md).",
        "mnemode rollout SIMULATOR --steps N --out FILE (--history FILE | --x0 X [--t0 T] [--cold-start]) "
        "[--forcing FILE]",
        (),
        "mnemode rollout RUN_DIR/export --history last_minutes.csv --steps 500 --out forecast.csv"),
    CommandDoc(
        "study", "one table and plots of a sweep's (or several runs') metrics",
        "Read a sweep directory (or any run directories) and write one table (study.csv, study.md: each "
        "job's overrides, status and headline metrics per model) and plots of each headline metric against "
        "each swept parameter, one line per model with its quartile band, seeds pooled and shown as dots. "
        "Failed and unfinished jobs are listed with their reason.",
        "mnemode study DIR [DIR ...] [--out DIR] [--overwrite]", (),
        "mnemode study mnemode-runs/study_scale_separation/sweep_2026-12-02_10-00-00"),
    CommandDoc(
        "correction", "read what a fitted model learned: R² against targets, equations, memory",
        "Write figures and a short report on a fitted model's learned correction into "
        "RUN_DIR/correction/<model>/: the correction along the test data against its derivative and "
        "flow-map targets with R², partial-dependence curves over the training envelope, for memory "
        "closures the learned time constants and how much each input's history carries, and a sparse "
        "polynomial surrogate (sequentially thresholded least squares) printed as equations. For a "
        "flow-map model it states that the correction is interval-averaged, not dz/dt, and gives the "
        "equivalent vector-field term.",
        "mnemode correction RUN_DIR [--model NAME] [--degree N] [--threshold F] [--overwrite]", (),
        "mnemode correction mnemode-runs/lorenz63_perturbed/2026-12-02_10-00-00 --model memoryless"),
    CommandDoc(
        "runs", "list runs (or a sweep's jobs) with their status and headline results",
        "List every run under a folder (default: the runs root, $MNEMODE_RUNS or ./mnemode-runs), or the "
        "jobs of one sweep, with its state, finished stages and each model's median validity time.",
        "mnemode runs [ROOT] [--json]", (),
        "mnemode runs mnemode-runs/tiny"),
)}

CONFIG_COMMANDS = tuple(name for name, d in COMMAND_DOCS.items() if d.groups)


def is_help_request(args: list[str]) -> bool:
    return any(a in HELP_FLAGS for a in args)


def _wrap(text: str, indent: int, first: str = "") -> list[str]:
    """``first`` then ``text`` wrapped to the screen, continuation lines indented by ``indent``."""
    lines = textwrap.wrap(text, WIDTH - indent) or [""]
    out = [first + lines[0] if first else " " * indent + lines[0]]
    out += [" " * indent + s for s in lines[1:]]
    return out


def _first_sentence(text: str) -> str:
    m = re.match(r"(.+?\.)(\s|$)", text)
    return m.group(1) if m else text


def _settings_lines(doc: ConfigDoc, prefix: str, indent: int = 4) -> list[str]:
    """``prefix.key = value   meaning`` for every setting of a config file (``_target_`` left out)."""
    out = []
    for group, choice, comment in doc.defaults:
        if group.startswith("/") and "@" in group:      # a node filled from another group's option
            key = f"{prefix}{group.split('@', 1)[1]}"
            what = f"{group[1:].split('@')[0]} option" + (f"; {comment}" if comment else "")
            out += _wrap(what, indent + 34, f"{' ' * indent}{key + ' = ' + choice:<33} ")
    for s in doc.settings:
        if s.key.endswith("_target_"):
            continue
        if s.value == "" and not s.comment:
            continue                                     # a bare section heading: its keys follow
        left = f"{prefix}{s.key}" + ("" if s.value == "" else f" = {s.value}")
        if s.comment and len(left) > 33:               # a long value: the meaning goes below it
            out += [f"{' ' * indent}{left}"] + _wrap(s.comment, indent + 34)
        elif s.comment:
            out += _wrap(s.comment, indent + 34, f"{' ' * indent}{left:<33} ")
        else:
            out.append(f"{' ' * indent}{left}")
    return out


def _chosen(args: list[str], groups: tuple[str, ...]) -> dict[str, str]:
    """Group choices named on the command line (``closure=recurrent_tanh``, ``+experiment=tiny``)."""
    chosen = {}
    for a in args:
        m = re.match(r"^\+{0,2}([A-Za-z_]+)=([\w.-]+)$", a)
        if m and m.group(1) in groups:
            chosen[m.group(1)] = m.group(2)
    return chosen


def config_command_help(name: str, args: list[str] | None = None) -> str:
    """The whole help screen of a config-taking command.

    Args:
        name: ``run``, ``fit``, ``generate`` or ``diagnose``.
        args: the rest of the command line; ``GROUP=OPTION`` items select which
            option's settings are shown.
    """
    doc = COMMAND_DOCS[name]
    root = config_root()
    defaults = default_choices(root)
    chosen = {g: c for g, (c, _) in defaults.items()}
    chosen.update(_chosen(list(args or []), doc.groups))
    out = [f"usage: {doc.usage}", ""]
    out += _wrap(doc.description, 0) + [""]
    out.append("arguments:")
    for arg, meaning in doc.arguments:
        out += _wrap(meaning, 20, f"  {arg:<17} ")
    out += ["", "example:", f"  {doc.example}", ""]

    primary = read_config_doc(root / "mnemode.yaml")
    out.append("settings of every run (override as KEY=VALUE):")
    out += _settings_lines(primary, "", indent=2)
    for group in doc.groups:
        options = group_options(group, root)
        if not options:
            continue
        default, why = defaults.get(group, ("null", ""))
        choice = chosen.get(group, default)
        out += ["", f"{group}: choose with {group}=OPTION" + (f" ({why})" if why else "")]
        for opt, odoc in options.items():
            mark = "*" if opt == default else " "
            out += _wrap(_first_sentence(odoc.description), 24, f"  {mark} {opt:<19} ")
        if choice in options:
            changes = "the settings it changes" if group == "experiment" else f"override as {group}.KEY=VALUE"
            out.append(f"  settings of {group}={choice} ({changes}):")
            prefix = "" if group == "experiment" else f"{group}."
            out += _settings_lines(options[choice], prefix, indent=4)
        elif choice not in ("null", None):
            out.append(f"  ({group}={choice} is not a shipped option; the choices are listed above)")
    out += ["", "* marks the default. `mnemode " + name + " --help GROUP=OPTION` shows that option's settings; "
            "`mnemode " + name + " --cfg job [overrides]` prints the composed config."]
    return "\n".join(out) + "\n"


def overview(version: str) -> str:
    """``mnemode --help``: every command in one screen."""
    out = [
        "usage: mnemode <command> [arguments]      (mnemode <command> --help for its own screen)", "",
        f"mnemode {version}: learn what a physics model is missing, assess it against references, "
        "export a frozen simulator.", "",
        "commands taking config overrides (GROUP=OPTION, KEY=VALUE; -m for a sweep):",
    ]
    for name in CONFIG_COMMANDS:
        out += _wrap(COMMAND_DOCS[name].summary, 13, f"  {name:<10} ")
    out += ["", "commands taking a path:"]
    for name, d in COMMAND_DOCS.items():
        if not d.groups:
            arg = d.usage.split()[2] if len(d.usage.split()) > 2 else ""
            out += _wrap(d.summary, 24, f"  {name + ' ' + arg.strip('[]'):<21} ")
    out += ["", "examples:"]
    out += [f"  {COMMAND_DOCS[n].example}" for n in ("run", "runs", "assess")]
    out += ["  mnemode run -m system.wall_response_time=0.1,1.0 name=tau_sweep"]
    return "\n".join(out) + "\n"
