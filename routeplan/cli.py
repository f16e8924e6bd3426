"""The ``routeplan`` command: a thin layer of click commands over the library.

Each command parses its options, calls one library function and renders the result. Library
modules are imported inside the commands, so ``routeplan --help`` stays fast and never
imports torch. Exit codes: 0 success, 2 bad input or usage, 1 internal fault.
"""

from __future__ import annotations

import json
import math
import traceback
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import click

EXIT_BAD_INPUT = 2
EXIT_FAULT = 1


class BadInput(click.ClickException):
    """A library :class:`~routeplan.errors.InputError`, shown as one line, exit code 2."""

    exit_code = EXIT_BAD_INPUT


class _Group(click.Group):
    """A click group that maps library errors to the exit codes of the contract.

    With ``--json`` on the command line (before a ``--``), a failure also prints ``{"error":
    MESSAGE, "exit_code": N}`` on stdout, so that a script reading stdout always gets JSON; the
    one line on stderr stays as without ``--json``. This covers errors of the commands and
    the usage errors click raises while parsing, the root group's own options included (an
    unknown root option, a bad ``--workspace``): those are raised in :meth:`parse_args`,
    before :meth:`invoke` runs, so both places print the JSON failure.
    """

    def parse_args(self, ctx: click.Context, args: list[str]) -> list[str]:
        ctx.meta[_JSON_KEY] = "--json" in args[: args.index("--")] if "--" in args else "--json" in args
        try:
            return super().parse_args(ctx, args)
        except click.ClickException as exc:  # the root's own options: click shows it and exits 2
            if not ctx.resilient_parsing:  # shell completion parses quietly
                _json_failure(ctx, exc.format_message(), exc.exit_code)
            raise

    def invoke(self, ctx: click.Context) -> Any:
        from .errors import InputError  # light: no numpy

        try:
            with warnings.catch_warnings():
                if not _debug(ctx):  # one line on stderr, not the source line behind it
                    warnings.showwarning = _one_line_warning
                return super().invoke(ctx)
        except InputError as exc:
            if _debug(ctx):
                traceback.print_exc()
            _json_failure(ctx, exc.one_line(), EXIT_BAD_INPUT)
            raise BadInput(exc.one_line()) from None
        except click.ClickException as exc:  # usage errors (exit 2) and BadInput raised by a command
            _json_failure(ctx, exc.format_message(), exc.exit_code)
            raise
        except (click.exceptions.Exit, click.Abort, KeyboardInterrupt, SystemExit):
            raise
        except Exception as exc:  # an internal fault: one line, exit 1
            if _debug(ctx):
                traceback.print_exc()
            line = (f"Internal error: {type(exc).__name__}: {str(exc).splitlines()[0] if str(exc) else ''} "
                    "(run again with --debug for the traceback; please report it)")
            if not _debug(ctx):
                click.echo(line, err=True)
            _json_failure(ctx, line, EXIT_FAULT)
            ctx.exit(EXIT_FAULT)


_JSON_KEY = "routeplan.json_requested"


def _json_failure(ctx: click.Context, message: str, exit_code: int) -> None:
    """Print a failure as JSON on stdout when the command line asked for ``--json``."""
    if ctx.meta.get(_JSON_KEY):
        click.echo(json.dumps({"error": message, "exit_code": int(exit_code)}, indent=2))


def _one_line_warning(message: Warning | str, category: type[Warning], filename: str, lineno: int,
                      file: Any = None, line: str | None = None) -> None:
    """Show a warning as ``warning: TEXT`` on stderr (``--debug`` shows Python's own form)."""
    click.echo(f"warning: {str(message).splitlines()[0] if str(message) else category.__name__}", err=True)


def _debug(ctx: click.Context) -> bool:
    root = ctx.find_root()
    return bool(root.params.get("debug")) or bool(root.obj and root.obj.debug)


@dataclass
class App:
    """What every command needs: the workspace folder, the console and flags."""

    folder: Path
    debug: bool = False
    quiet: bool = False
    _console: Any = field(default=None, repr=False)

    @property
    def console(self):
        """A rich console on stdout (created on first use)."""
        if self._console is None:
            from rich.console import Console

            self._console = Console(highlight=False, soft_wrap=False)
        return self._console

    def workspace(self):
        """Open the workspace (raises WorkspaceMissing with a hint)."""
        from .workspace import Workspace

        return Workspace.open(self.folder)

    def say(self, text: str) -> None:
        """Print a line unless --quiet."""
        if not self.quiet:
            self.console.print(text, markup=False, soft_wrap=True)  # one line: paths stay whole

    def emit_json(self, data: Any) -> None:
        """Write JSON to stdout (plain, for scripts); non-finite numbers are written as null.

        JSON has no NaN or infinity (RFC 8259, section 6), so a value such as an unreachable
        budget is written as ``null`` rather than Python's non-standard ``Infinity``.
        """
        click.echo(json.dumps(_finite_or_null(data), indent=2, sort_keys=False, default=_json_default,
                              allow_nan=False))


def _finite_or_null(value: Any) -> Any:
    """``value`` with every non-finite float (also in dicts, lists and numpy values) made None."""
    if isinstance(value, dict):
        return {key: _finite_or_null(item) for key, item in value.items()}
    if isinstance(value, (list, tuple)):
        return [_finite_or_null(item) for item in value]
    if hasattr(value, "tolist") and not isinstance(value, (str, bytes)):  # numpy scalars and arrays
        return _finite_or_null(value.tolist())
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def _json_default(value: Any) -> Any:
    if isinstance(value, Path):  # numpy values were made plain by _finite_or_null
        return str(value)
    raise TypeError(f"not JSON-serialisable: {type(value).__name__}")


pass_app = click.make_pass_decorator(App)
#: Seeds go to numpy and torch generators, which take integers in [0, 2**32 - 1] only.
SEED = click.IntRange(0, 2**32 - 1)
json_option = click.option("--json", "as_json", is_flag=True, help="Print the result as JSON for scripts.")


@click.group(cls=_Group, context_settings={"help_option_names": ["-h", "--help"], "max_content_width": 100})
@click.option(
    "--workspace",
    "-w",
    type=click.Path(file_okay=False, path_type=Path),
    envvar="ROUTEPLAN_WORKSPACE",
    default=Path("."),
    show_default="current folder, or $ROUTEPLAN_WORKSPACE",
    help="Folder that holds routeplan.sqlite.",
)
@click.option("--debug", is_flag=True, help="Show tracebacks of errors.")
@click.option("--quiet", "-q", is_flag=True, help="Print less (no progress bars, no tables on success).")
@click.version_option(package_name="routeplan", prog_name="routeplan")
@click.pass_context
def cli(ctx: click.Context, workspace: Path, debug: bool, quiet: bool) -> None:
    """Plan which cases go to which expert, learn when the model should defer, and freeze a
    routing policy that respects each expert's fee and capacity.

    A workspace is a folder with one routeplan.sqlite file. A typical session:

    \b
        routeplan init --labels first,second,reject --error-cost 1
        routeplan cases import tiles.csv --group-column kiln
        routeplan truth import truth.csv
        routeplan experts add kiln_master --fee 0.08 --capacity 0.2
        routeplan answers import history.csv
        routeplan status

    Exit codes: 0 success, 2 bad input or usage (one line on stderr names the file, the line
    and the problem; the workspace is left as it was), 1 internal fault.
    """
    ctx.obj = App(folder=workspace, debug=debug, quiet=quiet)


# --------------------------------------------------------------------------- init


@cli.command()
@click.option("--labels", required=True, help="The label set, comma separated, e.g. first,second,reject.")
@click.option(
    "--error-cost",
    type=float,
    default=1.0,
    show_default=True,
    help="What one wrong decision costs, in the unit of fees and budgets.",
)
@json_option
@pass_app
def init(app: App, labels: str, error_cost: float, as_json: bool) -> None:
    """Create a workspace (routeplan.sqlite) in the workspace folder.

    Refuses to overwrite an existing workspace.

    Example:

    \b
        routeplan --workspace tiles init --labels first,second,reject --error-cost 1
    """
    from .workspace import Workspace

    with Workspace.create(app.folder, labels.split(","), error_cost=error_cost) as ws:
        info = {"workspace": str(ws.folder.resolve()), "labels": ws.labels, "error_cost": ws.error_cost}
    if as_json:
        app.emit_json(info)
    else:
        app.say(f"Created workspace {info['workspace']} with labels {', '.join(info['labels'])} "
                f"(one wrong decision costs {error_cost:g}).")


# --------------------------------------------------------------------------- import groups


def _report_imports(app: App, results: list, as_json: bool) -> None:
    if as_json:
        app.emit_json([r.to_dict() for r in results])
    else:
        for r in results:
            app.say(r.message())


@cli.group()
def cases() -> None:
    """Bring cases (feature vectors, optional truth and group) into the workspace."""


@cases.command("import")
@click.argument("file", type=click.Path(path_type=Path))
@click.option("--id-column", default="case_id", show_default=True, help="Column with each case's unique id.")
@click.option("--truth-column", default=None, help="Column of verified outcomes (default: 'truth' if present).")
@click.option("--group-column", default=None, help="Column of groups (site, shift...) for competence tables; not a feature.")
@click.option("--feature-columns", default=None, help="Comma-separated feature columns (default: every other numeric column).")
@json_option
@pass_app
def cases_import(app, file, id_column, truth_column, group_column, feature_columns, as_json):
    """Import a cases file (CSV or Parquet), all rows or none.

    Feature columns are the file's other numeric columns unless --feature-columns names them;
    the first import fixes them. Non-numeric columns are kept for display on expert sheets.

    Example:

    \b
        routeplan cases import tiles.csv --id-column case_id --group-column kiln
    """
    from .ingest import import_cases

    features = [c.strip() for c in feature_columns.split(",")] if feature_columns else None
    with app.workspace() as ws:
        result = import_cases(ws, file, id_column=id_column, truth_column=truth_column,
                              group_column=group_column, feature_columns=features)
    _report_imports(app, [result], as_json)


@cli.group()
def truth() -> None:
    """Bring verified outcomes into the workspace."""


@truth.command("import")
@click.argument("file", type=click.Path(path_type=Path))
@click.option("--replace", is_flag=True, help="Allow changing truth that is already stored.")
@json_option
@pass_app
def truth_import(app, file, replace, as_json):
    """Import verified outcomes: a CSV or Parquet file with columns case_id, truth.

    Example:

    \b
        routeplan truth import truth.csv
    """
    from .ingest import import_truth

    with app.workspace() as ws:
        result = import_truth(ws, file, replace=replace)
    _report_imports(app, [result], as_json)


@cli.group()
def scores() -> None:
    """Bring your own model's class probabilities in, to keep that model (two-stage)."""


@scores.command("import")
@click.argument("file", type=click.Path(path_type=Path))
@click.option("--replace", is_flag=True, help="Allow changing probabilities that are already stored.")
@json_option
@pass_app
def scores_import(app, file, replace, as_json):
    """Import your model's class probabilities: columns case_id and proba_<label> per label.

    Once every case with truth has them, 'routeplan fit' keeps your model and learns only
    the routing (whether your model decides or which expert takes the case); new cases
    given to 'routeplan route' must then carry the same proba_<label> columns.

    Example:

    \b
        routeplan scores import our_model.csv
    """
    from .ingest import import_scores

    with app.workspace() as ws:
        result = import_scores(ws, file, replace=replace)
    _report_imports(app, [result], as_json)


@cli.group()
def experts() -> None:
    """Add experts (annotators, reviewers) with their fee and capacity."""


@experts.command("add")
@click.argument("name")
@click.option("--fee", type=float, default=None,
              help="Fee per case, in the unit of budgets and --error-cost. Needed for a new expert.")
@click.option("--capacity", type=float, default=None,
              help="Largest share of routed cases this expert may take, in [0, 1]. A new expert "
                   "gets 1 without it.")
@json_option
@pass_app
def experts_add(app, name, fee, capacity, as_json):
    """Add an expert, or change the fee and/or capacity of one already there.

    NAME must be safe as a file name (letters, digits, '_', '.', '-') and not 'model'.
    For an expert already there, what you leave out stays as it was.

    Example:

    \b
        routeplan experts add kiln_master --fee 0.08 --capacity 0.2
        routeplan experts add kiln_master --capacity 0.3    # the fee stays 0.08
    """
    from .ingest import add_expert

    with app.workspace() as ws:
        result = add_expert(ws, name, fee=fee, capacity=capacity)
    _report_imports(app, [result], as_json)


@experts.command("import")
@click.argument("file", type=click.Path(path_type=Path))
@json_option
@pass_app
def experts_import(app, file, as_json):
    """Import several experts: a CSV or Parquet file with columns name, fee[, capacity].

    Experts already there get the file's fee; they keep their capacity where the file
    has no capacity column or leaves the cell empty (a new expert then gets 1).

    Example:

    \b
        routeplan experts import experts.csv
    """
    from .ingest import import_experts

    with app.workspace() as ws:
        result = import_experts(ws, file)
    _report_imports(app, [result], as_json)


@cli.group()
def answers() -> None:
    """Bring experts' answers into the workspace."""


@answers.command("import")
@click.argument("files", nargs=-1, required=True, type=click.Path(path_type=Path))
@click.option("--strict", is_flag=True, help="Refuse answers that no round asked for.")
@json_option
@pass_app
def answers_import(app, files, strict, as_json):
    """Import answer files (columns case_id, expert, answer), all files or none.

    Answers to a round's assignments are linked to them, also after the round was closed
    (they are counted as late, and the assignment as answered); answers nobody asked for (a
    team's historical answers) are kept as historical, outside the unbiased audit estimates.

    Example:

    \b
        routeplan answers import answers/apprentice.csv answers/kiln_master.csv
    """
    from .ingest import import_answers

    with app.workspace() as ws:
        results = import_answers(ws, list(files), strict=strict)
    _report_imports(app, results, as_json)


# --------------------------------------------------------------------------- fit


@cli.command()
@click.option("--seed", type=SEED, default=0, show_default=True, help="Seeds the validation split and every router.")
@click.option("--router", "routers", multiple=True,
              help="Fit only this router (repeatable): plugin-ensemble, plugin, asym-mlp, softmax-mlp, "
                   "ova-mlp, plugin-linear, ... "
                   "Default: the standard candidates, keeping the best on validation.")
@click.option("--max-epochs", type=click.IntRange(1, 10_000), default=None, help="Cap on training epochs.")
@click.option("--two-stage/--no-two-stage", "two_stage", default=None,
              help="Keep your own model (probabilities from 'routeplan scores import') and learn only the routing. "
                   "Default: when every case with truth has imported probabilities.")
@click.option("--class-offset", type=click.Choice(["auto", "always", "never"]), default=None,
              help="Two-stage only: start each expert's correctness model from its accuracy per true class "
                   "when validation clearly favours it and its accuracy differs by class on its answers (auto, "
                   "the default), for every expert, or never.")
@json_option
@pass_app
def fit(app, seed, routers, max_epochs, two_stage, class_offset, as_json):
    """Fit the classifier and router on the cases with truth and the answers gathered so far.

    Fits the candidate routers (a plug-in router: classifier plus per-expert correctness
    models; the average of three such routers, preferred unless another candidate is
    clearly better; and joint learners trained with the cost-sensitive deferral
    surrogates), compares them with the baselines (model alone, each expert alone) on
    held-out cases by system cost with 95% intervals, keeps the best, and stores every
    fitted model as a version. With your own model's probabilities imported for every case
    with truth ('routeplan scores import'), that model is kept and only the routing is
    learned (two-stage).

    Example:

    \b
        routeplan fit --seed 1
        routeplan fit --router plugin
        routeplan fit --two-stage        (after 'routeplan scores import')
        routeplan fit --two-stage --class-offset never
    """
    from .fitting import fit_workspace

    with app.workspace() as ws:
        report = fit_workspace(ws, routers=tuple(routers) or None, random_state=seed, max_epochs=max_epochs,
                               two_stage=two_stage, class_offset=class_offset,
                               verbose=app.console.is_terminal and not (app.quiet or as_json), console=app.console)
    if as_json:
        app.emit_json(report.to_dict())
        return
    if app.quiet:
        return
    from .report import render_fit

    app.console.print(render_fit(report))


# --------------------------------------------------------------------------- freeze and route


@cli.command()
@click.option("--out", "out_path", required=True, type=click.Path(dir_okay=False, path_type=Path),
              help="The policy file to write (JSON manifest + arrays + sha256).")
@click.option("--card", "card_path", type=click.Path(dir_okay=False, path_type=Path), default=None,
              help="The Markdown policy card (default: the --out name with .md).")
@click.option("--model", "model_id", type=int, default=None, help="A stored model id (default: the chosen one).")
@click.option("--overwrite", is_flag=True, help="Replace a policy file or card already there.")
@json_option
@pass_app
def freeze(app, out_path, card_path, model_id, overwrite, as_json):
    """Freeze the fitted router as a routing policy file, with a policy card beside it.

    Solves the capacity LP on the fit's held-out cases for each expert's dual price, and
    records held-out estimates (system cost, accuracy, coverage, workload, with 95%
    intervals) of the capped routing in the file. Capacities are the experts' current
    ones. The file is recorded in the workspace.

    Example:

    \b
        routeplan freeze --out tiles-policy.json --card tiles-policy.md
    """
    from .freezing import freeze_workspace

    with app.workspace() as ws:
        result = freeze_workspace(ws, out_path, card=card_path, model_id=model_id, overwrite=overwrite)
    if as_json:
        app.emit_json(result.to_dict())
    elif not app.quiet:
        app.console.print(result)


@cli.command()
@click.option("--policy", "policy_path", required=True, type=click.Path(dir_okay=False, path_type=Path),
              help="A policy file written by 'routeplan freeze'.")
@click.argument("cases_path", metavar="CASES", type=click.Path(dir_okay=False, path_type=Path))
@click.option("--out", "out_path", required=True, type=click.Path(dir_okay=False, path_type=Path),
              help="The decisions file: Parquet if it ends in .parquet or .pq, else CSV.")
@click.option("--exact", is_flag=True,
              help="Solve the capacity LP over the whole file (least total cost) instead of routing with "
                   "the policy's prices and a running count.")
@click.option("--id-column", default="case_id", show_default=True, help="Column with each case's unique id.")
@click.option("--chunk-size", type=click.IntRange(min=1), default=65536, show_default=True,
              help="Cases scored at once (bounds memory; does not change the decisions).")
@click.option("--outside-range", type=click.Choice(["expert", "model"]), default="expert", show_default=True,
              help="Where a case with a feature outside the range seen in training goes: to an expert while "
                   "one has room (the model's estimates there are extrapolations), or like any other case.")
@click.option("--overwrite", is_flag=True, help="Replace a decisions file already there.")
@json_option
@pass_app
def route(app, policy_path, cases_path, out_path, exact, id_column, chunk_size, outside_range, overwrite,
          as_json):
    """Route new cases (CSV or Parquet) with a frozen policy; no workspace needed.

    Writes one row per case, in input order: case_id, route (model or an expert's name),
    label (the model's class where route is model, else empty), expected_cost, the expected
    cost of every option, and outside_range (1 where a feature lies outside the training
    range). Each expert's capacity share is held within the file (the running count starts
    with it), so route cases in batches rather than one at a time. Refuses a policy whose
    sha256, format version or manifest does not check out.

    Example:

    \b
        routeplan route --policy tiles-policy.json new_tiles.csv --out decisions.csv
    """
    from .deploy import route_file

    result = route_file(policy_path, cases_path, out_path, exact=exact, id_column=id_column,
                        chunk_size=chunk_size, outside_range=outside_range, overwrite=overwrite,
                        console=app.console, progress=not (app.quiet or as_json), workspace=app.folder)
    if result.outside_warning:
        click.echo(result.outside_warning, err=True)
    if as_json:
        app.emit_json(result.to_dict())
    elif not app.quiet:
        app.console.print(result)


# --------------------------------------------------------------------------- rehearse


@cli.command()
@click.option("--rounds", "n_rounds", type=click.IntRange(1, 50), default=6, show_default=True, help="Rounds per strategy.")
@click.option("--budget", "budget_per_round", type=click.FloatRange(min=0, min_open=True, max=1e12), default=10.0, show_default=True,
              help="Budget per round, in fee units.")
@click.option("--cases", "n_pool", type=click.IntRange(100, 200_000), default=3000, show_default=True,
              help="Cases in the rehearsal's pool (all with truth); with --profiles at most half of the "
                   "workspace's cases with truth, the rest held out to measure the cost.")
@click.option("--profiles", "profiles_path", type=click.Path(path_type=Path), default=None,
              help="Rehearse on the workspace's own cases with truth instead of a simulated scenario, with "
                   "each expert's assumed accuracy from this CSV or Parquet file (columns expert, label, "
                   "accuracy; an empty label covers the expert's other labels).")
@click.option("--strategies", default="value,uncertain,random", show_default=True,
              help="Comma-separated strategies to compare.")
@click.option("--audit-share", type=click.FloatRange(0, 1), default=0.1, show_default=True,
              help="Share of each round's budget spent uniformly at random.")
@click.option("--weighting", type=click.Choice(["none", "stabilized", "recorded"]), default="none",
              show_default=True,
              help="How answers are weighted when a router is fitted: not at all (as 'fit' weighs answers of "
                   "rounds, which are picked from the features alone), stabilized over the rounds' designs, "
                   "or by each pick's own recorded probability.")
@click.option("--focus-margin", type=click.FloatRange(min=0), default=0.1, show_default=True,
              help="From the second round, value and uncertain ask only where the choice of the router fitted "
                   "after the previous round about the expert is open (its cost within this margin of the "
                   "best other option, either side), as 'round plan' does.")
@click.option("--no-focus", is_flag=True, help="Plan every round without the router's focus.")
@click.option("--seed", type=SEED, default=0, show_default=True, help="Seeds the scenario, the rounds and the routers.")
@click.option("--plot", "plot_path", type=click.Path(dir_okay=False, path_type=Path), default=None,
              help="Write the curves to this image: .png, or another format matplotlib writes (.pdf, .svg...).")
@click.option("--overwrite", is_flag=True, help="Replace a --plot file already there.")
@json_option
@pass_app
def rehearse(app, n_rounds, budget_per_round, n_pool, profiles_path, strategies, audit_share, weighting,
             focus_margin, no_focus, seed, plot_path, overwrite, as_json):
    """Rehearse a budget before spending money: on a simulated scenario, or on your own cases.

    Plays the rounds for each strategy, fits a router after each round, and shows how the
    exact system cost falls with the fees spent. By default the pool is synthetic, with
    known competence (three experts of different fees and regional strengths), and no
    workspace is needed. With --profiles it is the workspace's own cases with truth and its
    experts and fees, each expert right with the accuracy you assume for it (per label, if
    you like); the answers are simulated from those assumptions, so the figures are only as
    good as they are. Costs are in units of one wrong decision.

    Example:

    \b
        routeplan rehearse --rounds 6 --budget 10 --plot rehearsal.png
        routeplan rehearse --profiles assumed.csv --rounds 4 --budget 25
    """
    from .errors import InputError
    from .figures import check_plot_path
    from .files import check_outputs
    from .rehearse import STRATEGIES, budget_to_reach, scenario_from_workspace
    from .rehearse import rehearse as run

    check_outputs({"--plot": plot_path}, overwrite=overwrite, workspace=app.folder)  # before the rehearsal
    if plot_path is not None:
        check_plot_path(plot_path)

    chosen = [s.strip() for s in strategies.split(",") if s.strip()]
    unknown = [s for s in chosen if s not in STRATEGIES]
    if unknown or not chosen:
        raise InputError(f"--strategies: unknown strategy {unknown[0] if unknown else ''!r}; choose from {', '.join(STRATEGIES)}")
    scenario = None
    if profiles_path is not None:
        with app.workspace() as ws:
            scenario = scenario_from_workspace(ws, profiles_path, random_state=seed)
    from rich.progress import Progress

    with Progress(console=app.console, disable=app.quiet or as_json, transient=True) as bar:
        task = bar.add_task("rehearsing", total=len(chosen) * n_rounds)
        result = run(scenario, n_pool=n_pool, strategies=chosen, n_rounds=n_rounds, budget_per_round=budget_per_round,
                     audit_share=audit_share, weighting=weighting,
                     focus_margin=None if no_focus else focus_margin, random_state=seed,
                     progress=lambda text: bar.update(task, advance=1, description=text))
    target = result.full_information_cost + 0.01
    reach = budget_to_reach(result.curves, target)
    if plot_path is not None:
        from .figures import rehearsal_plot

        rehearsal_plot(result.curves, plot_path, bayes_cost=result.bayes_cost,
                       full_information_cost=result.full_information_cost)
    if as_json:
        app.emit_json({**result.to_dict(), "target": target, "budget_to_reach_target": reach})
        return
    from .report import render_rehearsal

    app.console.print(render_rehearsal(result, reach, target))
    if profiles_path is not None:
        app.say(f"Pool: {result.settings['n_pool']} of the workspace's cases with truth, "
                f"{result.settings['n_eval']} held out; answers simulated from the accuracies assumed in "
                f"{profiles_path}, costs in units of one wrong decision.")
    if plot_path is not None:
        app.say(f"Wrote the plot to {plot_path}")


# --------------------------------------------------------------------------- competence


@cli.command()
@click.option("--by", type=click.Choice(["class", "group", "region"]), default=None,
              help="Also break the table down by true class, by group, or by region of the feature space.")
@click.option("--basis", type=click.Choice(["truth", "audit"]), default="truth", show_default=True,
              help="truth: every answer on a case with known truth; audit: only the uniformly random audit "
                   "answers (unbiased for the pool).")
@click.option("--regions", "n_regions", type=click.IntRange(1, 50), default=6, show_default=True,
              help="Number of regions (k-means clusters of the standardised features).")
@click.option("--seed", type=SEED, default=0, show_default=True, help="Seed of the region clustering.")
@click.option("--csv", "csv_path", type=click.Path(dir_okay=False, path_type=Path), default=None,
              help="Write the table (broken down with --by, if given) to this CSV file.")
@click.option("--plot", "plot_path", type=click.Path(dir_okay=False, path_type=Path), default=None,
              help="Write a heatmap of accuracy per expert x class (or x group or region with --by) to this "
                   "image: .png, or another format matplotlib writes (.pdf, .svg...).")
@click.option("--overwrite", is_flag=True, help="Replace a --csv or --plot file already there.")
@json_option
@pass_app
def competence(app, by, basis, n_regions, seed, csv_path, plot_path, overwrite, as_json):
    """Show where each expert, and the model, can be trusted.

    For each expert and the model: answers, accuracy against truth with a 95% Wilson interval
    (flagged where too wide to act on), Cohen's kappa, and the expected wrong decisions saved
    per unit of fee against letting the model decide; per-class recall and precision;
    agreement between experts; and, where truth is missing, Dawid-Skene latent-truth estimates.
    The model's row uses only cases held out from its training.

    Example:

    \b
        routeplan competence --by region --plot competence.png
    """
    from .competence import workspace_competence

    with app.workspace() as ws:
        report = workspace_competence(ws, by=by, basis=basis, n_regions=n_regions, random_state=seed,
                                      csv_path=csv_path, plot_path=plot_path, overwrite=overwrite)
    if as_json:
        app.emit_json(report.to_dict())
        return
    from .report import render_competence

    app.console.print(render_competence(report, by=by, basis=basis))
    for label, path in (("table", csv_path), ("plot", plot_path)):
        if path is not None:
            app.say(f"Wrote the {label} to {path}")


# --------------------------------------------------------------------------- round


@cli.group("round")
def round_group() -> None:
    """Plan labelling rounds, export one sheet per expert, close rounds."""


@round_group.command("plan")
@click.option("--budget", type=float, required=True, help="Largest sum of fees for the round.")
@click.option("--strategy", type=click.Choice(["value", "uncertain", "random"]), default="value", show_default=True,
              help="value: value of information per fee, the rest of the budget to the least certain "
                   "cells per fee; uncertain: widest accuracy estimate per fee; random: uniform over "
                   "eligible pairs.")
@click.option("--seed", type=SEED, default=0, show_default=True, help="The same seed on the same workspace gives the same plan.")
@click.option("--audit-share", type=click.FloatRange(0, 1), default=0.1, show_default=True,
              help="Share of the budget drawn uniformly at random (audit), for unbiased accuracy estimates.")
@click.option("--max-per-expert", type=int, default=None, help="Most assignments per expert in this round.")
@click.option("--include-unverified", is_flag=True, help="Also send cases without truth.")
@click.option("--regions", type=click.IntRange(min=1), default=6, show_default=True,
              help="Regions of the feature space for the accuracy estimates.")
@click.option("--due-days", type=float, default=None,
              help="Answers are due this many days from now (at most 3650).")
@click.option("--focus-margin", type=click.FloatRange(min=0), default=0.1, show_default=True,
              help="Once 'fit' has kept a router, value and uncertain ask only where that router's choice "
                   "about the expert is open: its estimated cost within this margin (in errors) of the best "
                   "other option, either side, so the cases it clearly sends to the expert are left out. "
                   "The audit share stays uniform.")
@click.option("--no-focus", is_flag=True, help="Ignore the kept router when planning.")
@click.option("--dry-run", is_flag=True, help="Show the plan without storing it.")
@json_option
@pass_app
def round_plan(app, budget, strategy, seed, audit_share, max_per_expert, include_unverified, regions, due_days,
               focus_margin, no_focus, dry_run, as_json):
    """Choose which cases go to which expert in a new round.

    The fees of the round's assignments add up to at most --budget. Each expert is asked
    about at most --max-per-expert cases and at most its capacity share of the round's
    candidate cases (those the round may ask about; rounded up); no expert is asked twice
    about a case. Every assignment records its selection probability. After 'fit', the
    kept router's open decisions steer the default strategy (see --focus-margin); fit
    again after each round.

    Example:

    \b
        routeplan round plan --budget 40 --max-per-expert 150 --seed 3
    """
    from .rounds import plan_round

    with app.workspace() as ws:
        plan = plan_round(ws, budget, strategy=strategy, seed=seed, audit_share=audit_share,
                          max_per_expert=max_per_expert, include_unverified=include_unverified,
                          due_days=due_days, n_regions=regions,
                          focus_margin=None if no_focus else focus_margin, dry_run=dry_run)
    if as_json:
        app.emit_json(plan.to_dict())
    elif not app.quiet:
        app.console.print(plan)


@round_group.command("export")
@click.argument("round_id", metavar="ROUND", type=int)
@click.option("--out", "out_dir", required=True, type=click.Path(path_type=Path), help="Folder for the sheets (DIR/<expert>.csv).")
@click.option("--columns", default=None,
              help="Comma-separated feature or display columns to show on the sheets; 'group' shows "
                   "each case's group (the --group-column of cases import).")
@click.option("--overwrite", is_flag=True, help="Replace sheets already in the folder.")
@json_option
@pass_app
def round_export(app, round_id, out_dir, columns, overwrite, as_json):
    """Write one CSV sheet per expert of a round, column case_id first.

    Example:

    \b
        routeplan round export 1 --out sheets --columns group,glaze_um
    """
    from .rounds import export_round

    chosen = columns.split(",") if columns else None
    with app.workspace() as ws:
        result = export_round(ws, round_id, out_dir, columns=chosen, overwrite=overwrite)
    if as_json:
        app.emit_json(result.to_dict())
    else:
        app.say(result.message())


@round_group.command("close")
@click.argument("round_id", metavar="ROUND", type=int)
@json_option
@pass_app
def round_close(app, round_id, as_json):
    """Close a round; assignments still unanswered count as expired.

    Example:

    \b
        routeplan round close 1
    """
    from .rounds import close_round

    with app.workspace() as ws:
        result = close_round(ws, round_id)
    if as_json:
        app.emit_json(result.to_dict())
    else:
        app.say(result.message())


# --------------------------------------------------------------------------- status


@cli.command()
@json_option
@pass_app
def status(app: App, as_json: bool) -> None:
    """Show cases, experts, answers, rounds and spend.

    Example:

    \b
        routeplan status --json
    """
    from .report import render_status

    with app.workspace() as ws:
        info = ws.status()
    if as_json:
        app.emit_json(info)
    else:
        app.console.print(render_status(info))


def main() -> None:  # pragma: no cover - console entry for python -m
    """Entry point for ``python -m routeplan``."""
    cli(prog_name="routeplan")


if __name__ == "__main__":  # pragma: no cover
    main()
