"""Options of the ``sapwood`` commands, built by concern and shown in groups.

Each factory (:func:`input_options`, :func:`output_options`, :func:`tree_options`,
:func:`drift_options`, :func:`feed_options`, :func:`label_options`) adds the options of one
concern to a command and tags them with that concern's heading; a
:class:`GroupedCommand` prints its help with one section per heading. An option name has
one meaning across the commands: ``--format`` is always the format of input records,
``--form`` the form of what a command prints.

:class:`Whole` and :class:`Number` bound a value on the option's type and refuse it with
the house message: "--top must be a whole number >= 1, got 0".
"""

from __future__ import annotations

from typing import Any, Callable

import click

from connectors.sources import FORMATS
from stream.classify.settings import CRITERIA, LEAF_MODELS, NUMERIC_SPLITS
from stream.errors import ConfigError
from stream.regress.settings import REGRESSION_CRITERIA, REGRESSION_LEAF_MODELS
from stream.run.encoding import DEFAULT_CATEGORY_CAP, DEFAULT_CLASS_CAP
from stream.tree.settings import DETECTORS

from .output import echo

KINDS = ("numeric", "category", "id", "time", "ignore")
"""Field kinds a user may declare with ``--kind FIELD=KIND``."""

INPUT, OUTPUTS, TREE, DRIFT, FEEDS, LABELS, RUN_FILE = (
    "Input", "Outputs", "Tree", "Drift", "Live feeds and checkpoints",
    "Labels that come later", "Run file and help")
GROUP_ORDER = (INPUT, OUTPUTS, TREE, DRIFT, FEEDS, LABELS, RUN_FILE)


class GroupedOption(click.Option):
    """An option that knows the heading it is listed under, and, when it is an old name
    kept for a while, the name that replaces it."""

    def __init__(self, *args: Any, group: str | None = None, renamed_to: str | None = None,
                 **kwargs: Any) -> None:
        if renamed_to is not None:
            kwargs["hidden"] = True
        super().__init__(*args, **kwargs)
        self.group = group
        self.renamed_to = renamed_to

    def handle_parse_result(self, ctx: click.Context, opts: dict, args: list):
        if self.renamed_to is not None and opts.get(self.name) is not None:
            echo(f"sapwood: warning: {self.opts[0]} is now {self.renamed_to}; the old "
                       f"name goes in a later release", err=True)
        return super().handle_parse_result(ctx, opts, args)


def option(*decls: str, group: str | None = None, **kwargs: Any) -> Callable:
    """``click.option`` for a :class:`GroupedOption` listed under ``group``."""
    return click.option(*decls, cls=GroupedOption, group=group, **kwargs)


def renamed(old: str, new: str, name: str, **kwargs: Any) -> Callable:
    """A hidden option ``old`` that sets the same value as ``new`` and says it moved.

    It gets its own parameter (``name`` + ``_old``); :func:`take_renamed` merges it."""
    return click.option(old, f"{name}_old", cls=GroupedOption, renamed_to=new, default=None,
                        **kwargs)


def take_renamed(kw: dict, name: str) -> None:
    """Fold the hidden old-name value of ``name`` into ``kw[name]`` (the new name wins)."""
    old = kw.pop(f"{name}_old", None)
    if kw.get(name) is None and old is not None:
        kw[name] = old


def stack(*decorators: Callable) -> Callable:
    """Apply ``decorators`` so that they are listed in the order given."""
    def apply(function: Callable) -> Callable:
        for decorator in reversed(decorators):
            function = decorator(function)
        return function
    return apply


class GroupedCommand(click.Command):
    """A command whose help lists options in sections, one per concern."""

    def format_options(self, ctx: click.Context, formatter: click.HelpFormatter) -> None:
        sections: dict[str, list] = {}
        for param in self.get_params(ctx):
            record = param.get_help_record(ctx)
            if record is None:
                continue
            group = getattr(param, "group", None) or RUN_FILE
            sections.setdefault(group, []).append(record)
        order = [g for g in GROUP_ORDER if g in sections] + \
            [g for g in sections if g not in GROUP_ORDER]
        for group in order:
            with formatter.section(group):
                formatter.write_dl(sections[group])


class Whole(click.ParamType):
    """A whole number of at least ``minimum``."""

    name = "integer"

    def __init__(self, minimum: int) -> None:
        self.minimum = minimum

    def convert(self, value: Any, param: click.Parameter | None, ctx: click.Context | None):
        if isinstance(value, int) and not isinstance(value, bool):
            number = value
        else:
            try:
                number = int(str(value).strip())
            except ValueError:
                number = None
        if number is None or number < self.minimum:
            raise ConfigError(f"{_name(param)} must be a whole number >= {self.minimum}, "
                              f"got {value}")
        return number


class Number(click.ParamType):
    """A number above (or at least, ``inclusive``) ``minimum``, in ``unit``."""

    name = "number"

    def __init__(self, minimum: float, inclusive: bool = True, unit: str = "") -> None:
        self.minimum, self.inclusive, self.unit = minimum, inclusive, unit

    def convert(self, value: Any, param: click.Parameter | None, ctx: click.Context | None):
        try:
            number = float(value)
        except (TypeError, ValueError):
            number = None
        ok = number is not None and (number >= self.minimum if self.inclusive
                                     else number > self.minimum)
        if not ok:
            unit = f" {self.unit}" if self.unit else ""
            raise ConfigError(f"{_name(param)} must be a number{unit} "
                              f"{'>=' if self.inclusive else '>'} {self.minimum:g}, "
                              f"got {value}")
        return number


def _name(param: click.Parameter | None) -> str:
    return param.opts[0] if param is not None and param.opts else "value"


def parse_kinds(pairs: tuple[str, ...]) -> dict[str, str]:
    """``FIELD=KIND`` pairs as a dict, each KIND one of :data:`KINDS`."""
    declared = {}
    for pair in pairs:
        field, sep, kind = pair.partition("=")
        if not sep or not field or kind not in KINDS:
            raise ConfigError(f"--kind takes FIELD=KIND with KIND one of {', '.join(KINDS)}, "
                              f"got {pair!r}")
        declared[field] = kind
    return declared


# ---------------------------------------------------------------- option factories

def format_option(group: str | None = INPUT) -> Callable:
    """``--format``: the format of input records."""
    return option("--format", "fmt", group=group, type=click.Choice(sorted(FORMATS)),
                  default=None,
                  help="Format of the input records (default: from each file name; "
                       "sniffed on stdin).")


def concern_option() -> Callable:
    """A view's ``--concern``: which class leads (default: the one the run chose)."""
    return option("--concern", default=None, metavar="CLASS|high|low",
                  help="Lead with the rules predicting this class (default: the run's "
                       "class of concern); high or low for a numeric target.")


def exact_option() -> Callable:
    """A view's ``--exact``: thresholds in full rather than in the data's resolution."""
    return option("--exact", is_flag=True,
                  help="Print thresholds in full (by default they are cut to the decimals "
                       "the field's values carry, which selects the same records).")


def form_option(forms: tuple[str, ...], help: str, group: str | None = None) -> Callable:
    """``--form``: the form of what a command prints (with ``--format`` kept hidden for a
    release, under its old meaning)."""
    return stack(
        option("--form", "form", group=group, type=click.Choice(forms), default=None,
               help=help + f"  [default: {forms[0]}]"),
        renamed("--format", "--form", "form", type=click.Choice(forms)))


def input_options() -> Callable:
    """Where records come from and what their fields are."""
    return stack(
        option("--target", group=INPUT, required=True, help="Field to predict."),
        option("--task", group=INPUT, type=click.Choice(["classification", "regression"]),
               default=None,
               help="Predict a class or a number (default: from the target's values)."),
        option("--concern", group=INPUT, default=None, metavar="CLASS|high|low",
               help="The class of concern (the fault, alarm or reject class), which the "
                    "rules, notes, diff, watch and report lead with and whose precision, "
                    "recall and F1 the summary and metrics carry [the rarest class among "
                    "the first 1,000 labels]; for a numeric target high or low (the rules "
                    "predicting the highest, or lowest, values first)."),
        option("--by", "by", group=INPUT, default=None, metavar="FIELD",
               help="Learn one tree per value of FIELD (a line, site or asset "
                    "family): each output gets a folder per key, with keys.json listing "
                    "the keys."),
        option("--keys-in-memory", group=INPUT, type=int, default=1000, show_default=True,
               help="With --by: trees held in memory; the least recently seen are "
                    "saved to disk and reloaded when their key returns."),
        format_option(),
        option("--schema", "schema_path", group=INPUT, type=click.Path(dir_okay=False),
               help="Schema file (see `sapwood schema`); otherwise inferred."),
        option("--kind", "kinds", group=INPUT, multiple=True, metavar="FIELD=KIND",
               help="Declare one field's kind (numeric, category, id, time, ignore); "
                    "repeatable."),
        option("--batch-rows", group=INPUT, type=int, default=65536, show_default=True,
               help="Records read per batch (memory vs. call overhead; results are "
                    "equal)."),
        option("--header", "header", group=INPUT, metavar="NAME,NAME,...",
               help="Column names to use instead of the first line's (CSV, TSV), e.g. to "
                    "tell apart two columns the file names alike."),
        option("--category-cap", group=INPUT, type=int, default=DEFAULT_CATEGORY_CAP,
               show_default=True,
               help="Distinct values a category field keeps apart; later new values are "
                    "learned as one, '(other values)' (each value costs memory in every "
                    "leaf)."),
        option("--class-cap", group=INPUT, type=int, default=DEFAULT_CLASS_CAP,
               show_default=True,
               help="Classes the target may have; records with more go to the "
                    "quarantine."),
        option("--strict", group=INPUT, is_flag=True, help="Stop at the first bad record."),
        option("--quarantine", "quarantine_path", group=INPUT,
               type=click.Path(dir_okay=False),
               help="Where bad records go [sapwood-quarantine.jsonl]."),
    )


def output_options() -> Callable:
    """What a run writes besides the learner itself."""
    return stack(
        option("--summary", "summary_path", group=OUTPUTS, type=click.Path(dir_okay=False),
               help="Write the run's summary here (JSON)."),
        option("--save", "save_path", group=OUTPUTS, type=click.Path(dir_okay=False),
               help="Save the learner here at the end (to score with or inspect later)."),
        option("--snapshots", "snapshot_dir", group=OUTPUTS,
               type=click.Path(file_okay=False),
               help="Write rule snapshots (JSON and text) into this directory."),
        option("--snapshot-every", group=OUTPUTS, type=int, default=None,
               help="Records between snapshots [10000 with --snapshots]."),
        option("--snapshot-seconds", group=OUTPUTS, type=float, default=None,
               help="Also snapshot when this many seconds have passed."),
        option("--snapshot-history", group=OUTPUTS, is_flag=True,
               help="Keep a thinned history of old snapshots beyond --keep-snapshots."),
        option("--keep-snapshots", group=OUTPUTS, type=int, default=None,
               help="Keep only the newest this many snapshots."),
        option("--metrics", "metrics_path", group=OUTPUTS, type=click.Path(dir_okay=False),
               help="Write prequential metrics here (JSON lines) every --metrics-every "
                    "records."),
        option("--metrics-every", group=OUTPUTS, type=int, default=1000, show_default=True,
               help="Records between metric rows."),
        option("--window", group=OUTPUTS, type=int, default=1000, show_default=True,
               help="Records in the sliding window of the windowed metrics."),
        option("--predictions", "predictions_path", group=OUTPUTS,
               type=click.Path(dir_okay=False, allow_dash=True),
               help="Write each record's prediction here ('-' for stdout; .csv for CSV; "
                    "or an mqtt:// topic or redis:// stream)."),
        option("--alerts", "alerts_path", group=OUTPUTS, metavar="FILE|URL",
               help="Send an alert (a JSON object) when a rule predicting the class of "
                    "concern appears, goes or moves a threshold, or a confirmed change "
                    "happens above one: to a JSON-lines file, an mqtt:// topic, a redis:// "
                    "stream or an http(s):// URL (POST)."),
        option("--alert-every", group=OUTPUTS, type=int, default=10_000, show_default=True,
               help="Records between two comparisons of the rules for alerts."),
        option("--alert-move", group=OUTPUTS, type=float, default=0.1, show_default=True,
               help="A threshold move alerts when larger than this share of the range of "
                    "values seen for its field."),
        option("--events", "events_path", group=OUTPUTS, type=click.Path(dir_okay=False),
               help="Write drift events here (JSON lines: alarms, alternates started, "
                    "swapped in, dropped; with record, time and where in the tree)."),
    )


def tree_options() -> Callable:
    """How the tree grows; both tasks read the settings they know."""
    criteria = sorted(set(CRITERIA) | set(REGRESSION_CRITERIA))
    leaf_models = sorted(set(LEAF_MODELS) | set(REGRESSION_LEAF_MODELS))
    return stack(
        option("--criterion", group=TREE, type=click.Choice(criteria), default=None,
               help="Split merit: info_gain (default) or gini for a class target, "
                    "variance (default) or deviation for a numeric one."),
        option("--grace-period", group=TREE, type=int, default=None,
               help="Records a leaf sees between split attempts [200]."),
        option("--delta", group=TREE, type=float, default=None,
               help="One minus the confidence of the Hoeffding bound [1e-7]."),
        option("--tie-threshold", group=TREE, type=float, default=None,
               help="Split anyway once the Hoeffding bound is below this [0.05]."),
        option("--leaf-model", group=TREE, type=click.Choice(leaf_models), default=None,
               help="How leaves predict. Class target: majority, naive_bayes, or "
                    "adaptive (default: per leaf, whichever has been right more "
                    "often). Numeric target: mean, linear or adaptive (default)."),
        option("--numeric-splits", group=TREE, type=click.Choice(sorted(NUMERIC_SPLITS)),
               default=None,
               help="How numeric features propose thresholds for a class target: "
                    "gaussian (default: per-class normal estimators) or histogram "
                    "(quantile bins, for skewed sensors)."),
        renamed("--numeric-observer", "--numeric-splits", "numeric_splits",
                type=click.Choice(sorted(NUMERIC_SPLITS))),
        option("--thresholds", group=TREE, type=int, default=None,
               help="Candidate thresholds per numeric feature with gaussian splits [10]."),
        option("--bins", group=TREE, type=int, default=None,
               help="Bins per numeric feature of the quantile split statistics [32]."),
        option("--max-depth", group=TREE, type=int, default=None,
               help="Deepest a leaf may be."),
        option("--memory-mb", group=TREE, type=float, default=None,
               help="Budget for leaf statistics [256]; beyond it the least promising "
                    "leaves stop growing."),
    )


def drift_options() -> Callable:
    """How every node watches its error, and when an alternate subtree takes over."""
    return stack(
        option("--drift", "detector", group=DRIFT, type=click.Choice(sorted(DETECTORS)),
               default=None,
               help="Detector on every node's error: adwin (default) or page_hinkley; on "
                    "an alarm an alternate subtree grows beside the node. 'off' for a "
                    "plain Hoeffding tree."),
        option("--drift-delta", group=DRIFT, type=float, default=None,
               help="ADWIN's confidence [0.002]: smaller means fewer, later alarms."),
        option("--drift-threshold", group=DRIFT, type=float, default=None,
               help="Page-Hinkley's alarm threshold in summed error [50]."),
        option("--swap-after", group=DRIFT, type=int, default=None,
               help="Records both a node and its alternate must have scored before they "
                    "are compared [300]."),
        option("--swap-significance", group=DRIFT, type=float, default=None,
               help="Significance of the test that swaps in or drops an alternate "
                    "[0.05]."),
    )


SETTING_NAMES = {"criterion": "criterion", "grace_period": "grace_period", "delta": "delta",
                 "tie_threshold": "tie_threshold", "leaf_model": "leaf_model",
                 "numeric_splits": "numeric_splits", "thresholds": "candidate_thresholds",
                 "bins": "histogram_bins", "max_depth": "max_depth",
                 "memory_mb": "memory_mb", "detector": "detector",
                 "drift_delta": "adwin_delta", "drift_threshold": "page_hinkley_threshold",
                 "swap_after": "swap_after", "swap_significance": "swap_significance"}
"""Tree and drift option -> settings field."""


def settings_given(kw: dict) -> dict:
    """Take the tree and drift options out of ``kw``; those given, by settings name."""
    take_renamed(kw, "numeric_splits")
    given = {}
    for option_name, field in SETTING_NAMES.items():
        value = kw.pop(option_name, None)
        if value is not None:
            given[field] = value
    return given


def feed_options() -> Callable:
    """Live feeds (following a growing file) and durable state."""
    return stack(
        option("--follow", group=FEEDS, is_flag=True,
               help="Keep reading the last SOURCE as it grows, across rotation and "
                    "truncation, until SIGINT/SIGTERM (which checkpoint, then exit 0)."),
        option("--poll-seconds", group=FEEDS, type=float, default=0.5, show_default=True,
               help="With --follow: how often a quiet file is checked."),
        option("--idle-exit", group=FEEDS, type=float, default=None,
               help="With --follow: end after this many seconds without new records."),
        option("--checkpoint", "checkpoint_path", group=FEEDS, type=click.Path(),
               help="Keep the run's whole state in this file (with --by: this folder); "
                    "the same command resumes from it after a stop or crash (the "
                    "previous one is kept as FILE.prev)."),
        option("--checkpoint-every", group=FEEDS, type=int, default=None,
               help="Records between checkpoints [100000]; 0 for none."),
        option("--checkpoint-seconds", group=FEEDS, type=float, default=None,
               help="Also checkpoint when this many seconds have passed [60]; 0 for "
                    "none."),
    )


def label_options() -> Callable:
    """Labels that arrive on their own source, joined to earlier records by id."""
    return stack(
        option("--labels", "label_sources", group=LABELS, multiple=True, metavar="SOURCE",
               help="Labels that arrive later, joined to the records by id: files of id, "
                    "target and time rows (repeatable), or one mqtt:// or redis:// URL "
                    "polled once per batch of records."),
        option("--label-window", group=LABELS, type=int, default=None,
               help="Records a record waits for its label before it is dropped [10000]."),
        option("--label-seconds", group=LABELS, type=float, default=None,
               help="Also drop a record whose label has not come within this many "
                    "seconds of data time."),
        option("--id-field", group=LABELS, default=None,
               help="The field that identifies a record, for joining labels (when the "
                    "schema has no id field)."),
    )
