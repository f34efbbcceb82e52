"""What a learning run reads, how it learns and where its outputs go: :class:`LearnJob`.

Every rule a library caller can break is checked here, once, with the settings message
template; the command line keeps only rules about which flags were typed.
"""

from __future__ import annotations

import dataclasses
import math
from typing import Any

from stream.checks import CATEGORY_LIMIT, require_float, require_int
from stream.classify.settings import TreeSettings
from stream.errors import ConfigError
from stream.regress.settings import RegressionSettings

from .encoding import DEFAULT_CATEGORY_CAP, DEFAULT_CLASS_CAP

DEFAULT_QUARANTINE = "sapwood-quarantine.jsonl"
DEFAULT_CHECKPOINT_EVERY = 100_000
DEFAULT_CHECKPOINT_SECONDS = 60.0
DEFAULT_LABEL_WINDOW = 10_000
INFER_ROWS = 10_000
"""Records the schema is inferred from when it is not declared."""


@dataclasses.dataclass
class LearnJob:
    """What a learning run reads, how it learns and where its outputs go.

    ``settings`` fixes the learner's settings outright (a :class:`TreeSettings` for a
    class target, a :class:`RegressionSettings` for a numeric one); otherwise
    ``options`` (the user's choices by name, e.g. ``{"grace_period": 100}``) are applied
    to the defaults of whichever task the target calls for. Paths left as None are not
    written, except the quarantine: rejected records always go to a file
    (``DEFAULT_QUARANTINE`` unless named), created at the first reject.

    Durability and live feeds: ``checkpoint_path`` with ``checkpoint_every`` (records,
    0 for none) and ``checkpoint_seconds`` (0 for none); ``follow`` reads the last
    source on as it grows (``poll_seconds`` between checks, ``idle_exit`` ends the run
    after that many quiet seconds). With a checkpoint, a fresh run empties an existing
    quarantine file (otherwise appended to), as an attempt that died before its first
    checkpoint may have written to it. Delayed labels: ``labels`` (sources of id, target
    and time rows), joined within ``label_window`` records and, if set,
    ``label_seconds`` of data time; ``id_field`` declares the id field (see
    :mod:`stream.run.delayed_labels`).

    ``header`` names the columns of CSV and TSV files instead of their header lines
    (to tell apart columns the file names alike). ``concern`` names the class of concern
    (a class label; ``high`` or ``low`` for a numeric target), which views lead with;
    without it a class target's rarest class among the first 1,000 labels. ``alerts_path``
    (a file, mqtt://, redis:// or http(s):// URL) receives an alert when the rules
    predicting it change, checked every ``alert_every`` records; a threshold move alerts
    beyond ``alert_move`` of the field's range (see :mod:`stream.run.alerts`). ``by``
    names a field whose every value gets a tree of its own (a keyed run, see
    :mod:`stream.run.keyed`), at most ``keys_in_memory`` of them held in memory. Memory: ``category_cap`` distinct values of each category field are kept apart,
    later new values share one code; ``class_cap`` classes at most, a record with one
    more goes to the quarantine (see :class:`stream.run.encoding.Encoder`).
    """

    sources: list[str]
    target: str
    fmt: str | None = None
    schema_path: str | None = None
    declared: dict[str, str] = dataclasses.field(default_factory=dict)
    task: str | None = None
    settings: TreeSettings | RegressionSettings | None = None
    options: dict[str, Any] = dataclasses.field(default_factory=dict)
    summary_path: str | None = None
    save_path: str | None = None
    snapshot_dir: str | None = None
    snapshot_every: int = 0
    snapshot_seconds: float = 0.0
    snapshot_keep: int | None = None
    snapshot_history: bool = False
    metrics_path: str | None = None
    metrics_every: int = 1000
    quarantine_path: str | None = None
    strict: bool = False
    predictions_path: str | None = None
    events_path: str | None = None
    window: int = 1000
    fading: float = 0.999
    batch_rows: int = 65536
    header: list[str] | None = None
    category_cap: int = DEFAULT_CATEGORY_CAP
    class_cap: int = DEFAULT_CLASS_CAP
    checkpoint_path: str | None = None
    checkpoint_every: int = DEFAULT_CHECKPOINT_EVERY
    checkpoint_seconds: float = DEFAULT_CHECKPOINT_SECONDS
    follow: bool = False
    poll_seconds: float = 0.5
    idle_exit: float | None = None
    labels: list[str] = dataclasses.field(default_factory=list)
    label_window: int = DEFAULT_LABEL_WINDOW
    label_seconds: float = 0.0
    id_field: str | None = None
    concern: str | None = None
    alerts_path: str | None = None
    alert_every: int = 10_000
    alert_move: float = 0.1
    by: str | None = None
    keys_in_memory: int = 1000

    def __post_init__(self) -> None:
        require_int("checkpoint interval", self.checkpoint_every, 0)
        require_float("checkpoint interval in seconds", self.checkpoint_seconds, 0.0,
                      math.inf, low_open=False)
        require_float("poll interval in seconds", self.poll_seconds, 0.0, math.inf)
        if self.idle_exit is not None:
            require_float("idle exit in seconds", self.idle_exit, 0.0, math.inf,
                          low_open=False)
        if self.idle_exit is not None and not self.follow:
            raise ConfigError("an idle exit needs follow mode (--follow): a run over files "
                              "ends at their end anyway")
        require_int("batch rows", self.batch_rows, 1)
        for what, cap, least in (("category cap", self.category_cap, 1),
                                 ("class cap", self.class_cap, 2)):
            if require_int(what, cap, least) > CATEGORY_LIMIT:
                raise ConfigError(f"{what} must be at most {CATEGORY_LIMIT:,}, got {cap!r}")
        require_int("label window", self.label_window, 1)
        require_float("label window in seconds", self.label_seconds, 0.0, math.inf,
                      low_open=False)
        self.labels = list(self.labels)
        if self.id_field is not None:
            kind = self.declared.get(self.id_field, "id")
            if kind != "id":
                raise ConfigError(f"--id-field {self.id_field!r} is also declared "
                                  f"{kind!r}; a field has one kind")
            self.declared = {**self.declared, self.id_field: "id"}
        require_int("snapshot interval", self.snapshot_every, 0)
        require_float("snapshot interval in seconds", self.snapshot_seconds, 0.0, math.inf,
                      low_open=False)
        require_int("metrics interval", self.metrics_every, 1)
        require_int("alert interval", self.alert_every, 1)
        require_float("alert threshold move", self.alert_move, 0.0, 1.0, low_open=False)
        require_int("window", self.window, 1)
        require_int("keys in memory", self.keys_in_memory, 1)
        if (self.snapshot_every or self.snapshot_seconds) and not self.snapshot_dir:
            raise ConfigError("a snapshot interval needs a snapshot directory")

    def check_concern(self, task: str) -> None:
        """A numeric target's concern must be ``high`` or ``low``."""
        if task == "regression" and self.concern not in (None, "high", "low"):
            raise ConfigError(f"--concern for a numeric target must be 'high' or 'low' (the "
                              f"rules to show first), got {self.concern!r}")
        if task == "regression" and self.alerts_path is not None:
            raise ConfigError("--alerts needs a class target (alerts follow the rules that "
                              "predict the class of concern)")

    def learner_settings(self, task: str):
        """The settings the learner of ``task`` runs with (worked out from ``options``
        once per task and kept; a copy of the job keeps them too)."""
        kept = self.__dict__.setdefault("_settings_kept", {})
        if task not in kept:
            kept[task] = self._settings_for(task)
        return kept[task]

    def _settings_for(self, task: str):
        from .tasks import classifier_settings, regressor_settings

        if self.settings is not None:
            wanted = TreeSettings if task == "classification" else RegressionSettings
            if not isinstance(self.settings, wanted):
                raise ConfigError(f"the target calls for {task} but the settings given are "
                                  f"{type(self.settings).__name__}")
            return self.settings
        if task == "classification":
            return classifier_settings(self.options)
        return regressor_settings(self.options)


