"""Prediction sinks back to a broker: an MQTT topic or a Redis stream.

The engine builds one frame of predictions per learned stretch (columns such as origin,
line, id, predicted, confidence, rule) and hands it to :meth:`PredictionSink.write`.

* ``mqtt[s]://[user:password@]host[:port]/topic?qos=1`` publishes one JSON object per
  record to ``topic`` (QoS 1 by default) and waits until the broker has acknowledged the
  whole frame, so a write that returns is delivered to the broker.
* ``redis[s]://[user:password@]host[:port][/db]?stream=KEY[&maxlen=N]`` appends one
  stream entry per record (XADD, the columns as fields, missing values as empty text) in
  one pipelined round trip; ``maxlen`` trims the stream to about N entries (``MAXLEN ~``).
  Any node of a Redis Cluster serves as the address (:mod:`connectors.redis_clients`).

Names and error messages show the URL with its password replaced by ``***``.
"""

from __future__ import annotations

import threading
import time
from typing import Any, Callable, Protocol, runtime_checkable

import pandas as pd

from stream.errors import ConfigError, InputError

from .broker_payloads import Options, parse_address, redacted, scheme_of
from .redis_clients import open_redis


_WINDOW = 10000


@runtime_checkable
class PredictionSink(Protocol):
    """Where predictions go, a frame at a time."""

    name: str

    def write(self, frame: pd.DataFrame) -> None:
        """Send one frame of predictions (one record per row)."""
        ...

    def close(self) -> None:
        """Flush and release the connection; safe to call twice."""
        ...


def _output_error(display: str, reason: str, what: str = "predictions") -> InputError:
    # stream.errors has no output error class; exit code 2 ("could not be read or
    # written") is the nearest contract
    return InputError(f"cannot write {what} to {display!r}: {reason}")


class MqttPredictionSink:
    """Predictions published to an MQTT topic, one JSON object per record.

    Options: ``qos`` (0 or 1, default 1), ``retain`` (default false), ``client_id``
    (default: one the broker assigns), ``protocol`` (5, 3.1.1), ``username``,
    ``password`` (or ``password_env``, the name of an environment variable holding it),
    ``ca``, ``cert``, ``key``, ``tls_insecure``, ``timeout`` (s to wait for
    the broker's acknowledgements of one frame, default 30).
    """

    def __init__(self, spec: str, what: str = "predictions", **options: Any) -> None:
        address = parse_address(spec, 8883 if spec.lower().startswith("mqtts") else 1883)
        self.name = address.display
        opts = Options(address, options, "mqtt sink")
        self._topic = address.path
        if not self._topic or "+" in self._topic or "#" in self._topic:
            raise ConfigError(f"a topic for {what} must be a plain topic (no + or #), got "
                              f"{self._topic!r} in {self.name!r}")
        self._qos = opts.whole("qos", 1, 0, 1)
        self._retain = opts.flag("retain", False)
        client_id = opts.text("client_id", "")
        protocol = opts.choice("protocol", "5", ("5", "3.1.1"))
        username = opts.text("username", address.username)
        password = opts.password(address.password)
        ca, cert, key = opts.text("ca"), opts.text("cert"), opts.text("key")
        insecure = opts.flag("tls_insecure", False)
        self._timeout = opts.number("timeout", 30.0, 0.1)
        opts.finish()

        import paho.mqtt.client as mqtt
        from paho.mqtt.enums import CallbackAPIVersion

        version = mqtt.MQTTv5 if protocol == "5" else mqtt.MQTTv311
        self._client = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=client_id,
                                   protocol=version)
        if username is not None:
            self._client.username_pw_set(username, password)
        if address.scheme == "mqtts":
            self._client.tls_set(ca_certs=ca, certfile=cert, keyfile=key)
            if insecure:
                self._client.tls_insecure_set(True)
        connected = threading.Event()
        self._refusal = None

        def on_connect(client, userdata, flags, reason_code, properties):
            self._refusal = reason_code if reason_code.is_failure else None
            connected.set()

        self._client.on_connect = on_connect
        self._client.reconnect_delay_set(1, 30)
        self._client.max_queued_messages_set(0)
        self._client.max_inflight_messages_set(1000)
        try:
            self._client.connect(address.host, address.port)
        except OSError as exc:
            raise _output_error(self.name, exc.strerror or str(exc), what) from exc
        self._client.loop_start()
        self._closed = False
        if not connected.wait(self._timeout) or self._refusal is not None:
            self.close()
            reason = f"the broker refused the connection: {self._refusal}" \
                if self._refusal is not None else \
                f"no answer from the broker within {self._timeout:g} s"
            raise _output_error(self.name, reason, what)

    def write(self, frame: pd.DataFrame) -> None:
        """Publish every row and wait until the broker has them (QoS 1)."""
        if not len(frame):
            return
        self.publish_texts(frame.to_json(orient="records", lines=True).splitlines())

    def publish_texts(self, lines: list[str], what: str = "predictions") -> None:
        """Publish each text as one message and wait until the broker has them (QoS 1)."""
        deadline = time.monotonic() + self._timeout
        # paho numbers messages in flight with 16-bit packet ids, so at most _WINDOW
        # are outstanding at once
        for start in range(0, len(lines), _WINDOW):
            infos = [self._client.publish(self._topic, line, qos=self._qos,
                                          retain=self._retain)
                     for line in lines[start:start + _WINDOW]]
            for info in infos:
                try:
                    info.wait_for_publish(max(deadline - time.monotonic(), 0.0))
                except (ValueError, RuntimeError) as exc:
                    raise _output_error(self.name, str(exc), what) from exc
                if not info.is_published():
                    raise _output_error(self.name, f"the broker did not acknowledge the "
                                                   f"{what} within {self._timeout:g} s", what)

    def close(self) -> None:
        if self._closed:
            return
        self._closed = True
        self._client.disconnect()
        self._client.loop_stop()


class RedisPredictionSink:
    """Predictions appended to a Redis stream, one entry per record.

    Options: ``stream`` (required), ``maxlen`` (trim to about this many entries),
    ``username``, ``password`` (or ``password_env``, the name of an environment variable
    holding it), ``ca``, ``cert``, ``key``, ``tls_insecure``,
    ``timeout`` (socket timeout in s, default 30).
    """

    def __init__(self, spec: str, what: str = "predictions", **options: Any) -> None:
        address = parse_address(spec, 6379)
        self.name = address.display
        opts = Options(address, options, "redis sink")
        self._stream = opts.text("stream")
        if not self._stream:
            raise ConfigError(f"a Redis stream for {what} needs a name: add ?stream=KEY "
                              f"to {self.name!r}")
        self._maxlen = opts.whole("maxlen", None, 1)
        username = opts.text("username", address.username)
        password = opts.password(address.password)
        ca, cert, key = opts.text("ca"), opts.text("cert"), opts.text("key")
        insecure = opts.flag("tls_insecure", False)
        timeout = opts.number("timeout", 30.0, 0.1)
        opts.finish()
        db_text = address.path.strip("/") or "0"
        if not db_text.isdigit():
            raise ConfigError(f"database must be a whole number >= 0, got {db_text!r} "
                              f"(in {self.name!r})")

        import redis

        tls = {}
        if address.scheme == "rediss":
            tls = dict(ssl=True, ssl_ca_certs=ca, ssl_certfile=cert, ssl_keyfile=key,
                       ssl_check_hostname=not insecure)
        self._errors = (redis.RedisError, OSError)
        try:
            self._client, _ = open_redis(address.host, address.port, int(db_text),
                                         self.name, username=username, password=password,
                                         socket_timeout=timeout,
                                         socket_connect_timeout=timeout, **tls)
        except self._errors as exc:
            raise _output_error(self.name, str(exc), what) from exc

    def write(self, frame: pd.DataFrame) -> None:
        """XADD every row in one pipelined round trip."""
        if not len(frame):
            return
        names = [str(c) for c in frame.columns]
        columns = [_as_text(frame[c]) for c in frame.columns]
        self.append_entries([[x for pair in zip(names, values) for x in pair]
                             for values in zip(*columns)])

    def append_entries(self, entries: list[list[str]], what: str = "predictions") -> None:
        """XADD each entry (field, value, field, value, ...) in one pipelined round trip."""
        trim = ("MAXLEN", "~", self._maxlen) if self._maxlen else ()
        pipe = self._client.pipeline(transaction=False)
        for args in entries:
            pipe.execute_command("XADD", self._stream, *trim, "*", *args)
        try:
            pipe.execute()
        except self._errors as exc:
            raise _output_error(self.name, str(exc), what) from exc

    def close(self) -> None:
        self._client.close()


def _as_text(column: pd.Series) -> list[str]:
    text = column.astype(str).to_numpy(dtype=object)
    text[column.isna().to_numpy()] = ""
    return text.tolist()


SINKS: dict[str, Callable[..., PredictionSink]] = {
    "mqtt": MqttPredictionSink,
    "mqtts": MqttPredictionSink,
    "redis": RedisPredictionSink,
    "rediss": RedisPredictionSink,
}
"""URL scheme -> prediction sink class."""


def open_prediction_sink(spec: str, **options: Any) -> PredictionSink:
    """The broker prediction sink a URL names (see the module docstring).

    Raises
    ------
    ConfigError
        Unknown scheme or a bad option.
    InputError
        The broker cannot be reached (exit code 2).
    """
    scheme = scheme_of(spec)
    if scheme not in SINKS:
        raise ConfigError(f"prediction sink scheme must be one of {', '.join(sorted(SINKS))}"
                          f", got {scheme!r} in {redacted(spec)!r}")
    return SINKS[scheme](spec, **options)


