"""Alerts: a small message when the rules that lead to the class of concern change.

Every ``alert_every`` records (and at the end of a run) the rules predicting the class of
concern are compared with those of the last check (:func:`stream.rules.diff.diff_rules`
matches them by their conditions). One alert is raised for each

* ``rule_appeared``: a rule predicting the class of concern that was not there;
* ``rule_gone``: one that is no longer there (or no longer predicts it);
* ``threshold_moved``: a kept rule whose threshold moved by more than ``move_share`` of
  the range of values seen for that field;
* ``confirmed_change``: an alternate subtree swapped in (a change the swap test
  confirmed) above a rule predicting the class of concern.

Bare detector alarms do not alert: on stationary data they come every few tens of
thousands of records. An alert carries an ``id`` made of the record count of its check
and its place in it, so a run resumed from a checkpoint, which checks again at the same
records, raises the same alerts under the same ids; receivers drop repeats by id.

:class:`AlertWatch` decides what to raise (pure: its state is plain data, kept in the
checkpoint); :class:`AlertDelivery` sends them, keeping those a sink could not take for
the next try (also kept in the checkpoint).
"""

from __future__ import annotations

from typing import Callable, Sequence

from stream.rules.concern import leads
from stream.rules.diff import diff_rules
from stream.rules.regions import region_of, within
from stream.rules.rule import Rule
from stream.rules.text import CAUTION, MARKS_LEGEND, rule_conditions_text, uses_marks
from stream.rules.thresholds import Thresholds
from stream.tree.paths import Condition

DEFAULT_ALERT_EVERY = 10_000
"""Records between two comparisons of the rules."""

DEFAULT_MOVE_SHARE = 0.1
"""A threshold move alerts when larger than this share of the field's range."""


class AlertWatch:
    """What changed in the rules predicting the class of concern since the last check."""

    def __init__(self, move_share: float = DEFAULT_MOVE_SHARE) -> None:
        self.move_share = move_share
        self.previous: list[Rule] = []       # the concern's rules at the last check
        self.swaps: list[dict] = []          # swap events since the last check
        self.checked_at = 0                  # records learned at the last check

    def note_events(self, rows: Sequence[dict]) -> None:
        """Keep the confirmed changes (swaps) among a stretch's drift events."""
        self.swaps.extend(row for row in rows if row.get("kind") == "swap")

    def check(self, rules: Sequence[Rule], header: dict, record: int, when: str,
              ranges: dict[str, list[float]]) -> list[dict]:
        """The alerts of a check at ``record`` records learned (``when``: its time), given
        the rules now and ``header`` (``target``, ``concern``, ``decimals``)."""
        concern = header.get("concern")
        self.checked_at = record
        if concern is None:
            self.swaps = []
            return []
        target = str(header.get("target", "target"))
        now = [r for r in rules if leads(r, concern)]
        result = diff_rules(self.previous, now)
        found: list[tuple[str, list[Rule], dict]] = []
        found += [("rule_appeared", [r], {}) for r, _ in result.added]
        found += [("rule_gone", [r], {}) for r, _ in result.removed]
        for change in result.matched:
            moves = [self._move(m, ranges) for m in change.moves]
            moves = [m for m in moves if m["share_of_range"] is None
                     or m["share_of_range"] > self.move_share]
            if moves:
                found.append(("threshold_moved", [change.new], {"moves": moves}))
        for swap in self.swaps:
            beneath = _beneath(swap, now)
            if beneath:
                found.append(("confirmed_change", beneath, {"change": {
                    k: swap.get(k) for k in ("record", "time", "node", "where",
                                             "error_before", "error_after")}}))
        self.previous, self.swaps = now, []
        style = Thresholds.of(header)
        return [_message(k, record, when, target, concern, kind, rules_, extra, style)
                for k, (kind, rules_, extra) in enumerate(found, 1)]

    def _move(self, move: dict, ranges: dict[str, list[float]]) -> dict:
        lo_hi = ranges.get(move["feature"])
        span = (lo_hi[1] - lo_hi[0]) if lo_hi else 0.0
        share = abs(move["new"] - move["old"]) / span if span > 0 else None
        return {"feature": move["feature"], "bound": move["bound"], "old": move["old"],
                "new": move["new"], "share_of_range": None if share is None
                else round(share, 6)}

    def state(self) -> dict:
        """Plain data for the checkpoint."""
        return {"previous": [r.to_dict() for r in self.previous], "swaps": self.swaps,
                "checked_at": self.checked_at, "move_share": self.move_share}

    @classmethod
    def from_state(cls, state: dict) -> "AlertWatch":
        watch = cls(float(state["move_share"]))
        watch.previous = [Rule.from_dict(r) for r in state["previous"]]
        watch.swaps = list(state["swaps"])
        watch.checked_at = int(state["checked_at"])
        return watch


def _beneath(swap: dict, rules: Sequence[Rule]) -> list[Rule]:
    """The rules whose region lies within the swapped node's (the node is on their path)."""
    path = [Condition.from_dict(c) for c in swap.get("path") or []]
    region = region_of(path)
    return [r for r in rules if within(region_of(r.conditions), region)]


def _message(k: int, record: int, when: str, target: str, concern: str, kind: str,
             rules: list[Rule], extra: dict, style: Thresholds) -> dict:
    return {"id": f"sapwood-alert-{record}-{k}", "kind": kind, "record": record,
            "time": when, "target": target, "concern": concern,
            "rules": [{"id": r.id, "text": f"IF {rule_conditions_text(r, style)} THEN "
                       f"{target} = {r.predict}", "rule": r.to_dict()} for r in rules],
            **extra, **({"marks": MARKS_LEGEND} if uses_marks(rules) else {}),
            "caution": CAUTION}


class AlertDelivery:
    """Sends alerts through a sink, keeping those it could not send for the next try."""

    def __init__(self, sink, warn: Callable[[str], None]) -> None:
        self.sink = sink
        self.warn = warn
        self.pending: list[dict] = []
        self.sent = 0
        self.raised = 0
        self._failing = False

    def deliver(self, alerts: list[dict]) -> None:
        """Send what is pending and ``alerts``; on failure keep them all (said once per
        outage)."""
        self.raised += len(alerts)
        self.pending.extend(alerts)
        if not self.pending:
            return
        try:
            self.sink.send(self.pending)
        except Exception as exc:   # any sink failure: keep the alerts, try again later
            if not self._failing:
                self.warn(f"{exc}; {len(self.pending):,} alert(s) kept to send again")
            self._failing = True
            return
        if self._failing:
            self.warn(f"alerts reach {self.sink.name!r} again")
        self._failing = False
        self.sent += len(self.pending)
        self.pending = []


class RunAlerts:
    """A run's alerts: when to check (every ``job.alert_every`` records learned, and at
    the end), what to raise, where to send it, and what the checkpoint keeps of it."""

    def __init__(self, job, warn: Callable[[str], None]) -> None:
        from connectors.alert_sinks import open_alert_sink

        self.every = job.alert_every
        self.watch = AlertWatch(job.alert_move)
        self.delivery = AlertDelivery(open_alert_sink(job.alerts_path), warn)
        self.warn = warn

    def records_to_boundary(self, learned: int) -> int:
        """Records until the next check."""
        return self.every - learned % self.every

    def note(self, rows: Sequence[dict]) -> None:
        self.watch.note_events(rows)

    def due(self, learned: int) -> bool:
        return learned % self.every == 0 and learned != self.watch.checked_at

    def check(self, rules: Sequence[Rule], header: dict, learned: int, when: str,
              ranges: dict[str, list[float]]) -> None:
        """Compare, raise and send (what cannot be sent now is kept)."""
        self.delivery.deliver(self.watch.check(rules, header, learned, when, ranges))

    def finish(self, checkpointed: bool) -> None:
        """Try once more to send what is pending; say what could not be, and where it
        stays."""
        self.delivery.deliver([])
        left = len(self.delivery.pending)
        if left:
            self.warn(f"{left:,} alert(s) could not be sent to {self.delivery.sink.name!r}"
                      + ("; the checkpoint keeps them and the next run sends them"
                         if checkpointed else "; without --checkpoint they are lost"))

    def close(self) -> None:
        """Release the sink (its connection); safe to call twice."""
        self.delivery.sink.close()

    def counts(self) -> dict:
        """For the summary: alerts raised, sent and waiting to be sent."""
        return {"raised": self.delivery.raised, "sent": self.delivery.sent,
                "pending": len(self.delivery.pending), "to": self.delivery.sink.name}

    def state(self) -> dict:
        return {"watch": self.watch.state(), "pending": self.delivery.pending,
                "raised": self.delivery.raised, "sent": self.delivery.sent}

    def restore(self, state: dict) -> None:
        self.watch = AlertWatch.from_state(state["watch"])
        self.delivery.pending = list(state["pending"])
        self.delivery.raised = int(state["raised"])
        self.delivery.sent = int(state["sent"])
