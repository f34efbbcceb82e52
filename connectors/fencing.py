"""Fencing: a learner that was replaced must not acknowledge or checkpoint any more.

A learner that is cut off from the others (a network partition) may still be running
when its replacement starts on the same stream, group and checkpoint; a scheduler that
restarts it elsewhere does not stop the old one. Each start takes a new *epoch*: it
increments a counter kept in Redis beside the stream (INCR; the key shares the stream's
hash slot, see :func:`connectors.redis_clients.same_slot_key`). From then on:

* every acknowledgement is a script that runs XACK only while the counter still holds
  the learner's epoch (Redis runs a script atomically: nothing runs between its GET and
  its XACK);
* every checkpoint is written only after the counter is read and found unchanged, once
  before the old checkpoint is set aside and once just before the new one is renamed
  into place.

A learner that finds a higher epoch raises :class:`~stream.errors.SupersededError` and
stops without writing anything more. This is the fencing-token scheme of Kleppmann,
"How to do distributed locking" (2016), with the token checked by the store that holds
the state; the check before a rename in a shared folder is not atomic with the rename (a
file system has no conditional rename), so the window is the time between the two.
"""

from __future__ import annotations

from typing import Callable

from stream.errors import ConfigError, SupersededError

from .redis_clients import same_slot_key

# KEYS[1] the stream, KEYS[2] the fence; ARGV[1] the epoch, ARGV[2] the group, the rest ids
ACK_SCRIPT = """
local held = redis.call('GET', KEYS[2])
if held ~= ARGV[1] then
  return redis.error_reply('SUPERSEDED ' .. tostring(held))
end
return redis.call('XACK', KEYS[1], ARGV[2], unpack(ARGV, 3))
"""
ACK_CHUNK = 4000
"""Ids per fenced XACK: unpack() of a script passes its values on Lua's C stack, which
holds about 8,000 (LUAI_MAXCSTACK)."""


class Fence:
    """The epoch of one learner of ``stream`` (group, and consumer when several
    learners share the group).

    ``execute`` sends one command to the node that serves the stream (the caller's
    connection handling, retries included). On a cluster the fence key shares the
    stream's hash slot, so the script may touch both.
    """

    def __init__(self, stream: str, owner: str, display: str,
                 execute: Callable[..., object], cluster: bool) -> None:
        suffix = f"sapwood-fence:{owner}"
        try:
            self.key = same_slot_key(stream, suffix)
        except ConfigError:
            if cluster:
                raise
            self.key = f"{stream}:{suffix}"   # one server: any two keys go together
        self.stream = stream
        self.display = display
        self._execute = execute
        self.epoch: int | None = None

    def take(self) -> int:
        """Start a new epoch; any learner holding an older one is fenced off."""
        self.epoch = int(self._execute("INCR", self.key))
        return self.epoch

    def check(self) -> None:
        """Raise SupersededError when a later learner has taken a new epoch."""
        held = self._execute("GET", self.key)
        held = int(held) if held is not None else None
        if held != self.epoch:
            raise self.superseded(held)

    def ack_command(self, group: str, ids: list[bytes]) -> tuple:
        """The fenced XACK of ``ids`` as one command (EVAL)."""
        return ("EVAL", ACK_SCRIPT, 2, self.stream, self.key, self.epoch, group, *ids)

    def superseded(self, held) -> SupersededError:
        return SupersededError(
            f"{self.display}: another learner of this stream has started (epoch {held}; "
            f"this one holds epoch {self.epoch}); stopping without acknowledging or "
            f"checkpointing anything more (fence key {self.key!r})")
