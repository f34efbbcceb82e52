"""Where alerts go: a JSON-lines file, an MQTT topic, a Redis stream or an HTTP endpoint.

An alert is a small JSON object (see :mod:`stream.run.alerts`). Each sink sends a list of
them and returns only once every one is delivered (the file written and flushed to disk,
the broker's acknowledgement, a 2xx answer), else raises :class:`InputError`:

* a path: one JSON object per line, appended;
* ``mqtt[s]://...topic`` (the options of :class:`connectors.sinks.MqttPredictionSink`):
  one message per alert, QoS 1;
* ``redis[s]://...?stream=KEY``: one entry per alert with the fields ``id`` and ``alert``
  (the JSON text);
* ``http[s]://host[:port]/path``: one POST per alert, ``Content-Type: application/json``;
  option ``timeout`` (s, default 10) as ``?timeout=5``; a header line through the
  environment, ``header_env=VARIABLE`` (e.g. an ``Authorization: ...`` line, never shown).
"""

from __future__ import annotations

import json
import os
import urllib.error
import urllib.parse
import urllib.request
from typing import Protocol

from stream.errors import ConfigError, InputError

from .broker_payloads import redacted, scheme_of


class AlertSink(Protocol):
    """Sends alerts; :meth:`send` returns once all are delivered."""

    name: str

    def send(self, alerts: list[dict]) -> None: ...

    def close(self) -> None: ...


def _failed(name: str, reason: str) -> InputError:
    return InputError(f"cannot send alerts to {name!r}: {reason}")


class FileAlertSink:
    """Alerts appended to a JSON-lines file, flushed and synced before :meth:`send`
    returns."""

    def __init__(self, path: str) -> None:
        self.name = path
        self._path = path

    def send(self, alerts: list[dict]) -> None:
        try:
            with open(self._path, "a", encoding="utf-8") as out:
                out.writelines(json.dumps(a, sort_keys=True) + "\n" for a in alerts)
                out.flush()
                os.fsync(out.fileno())
        except OSError as exc:
            raise _failed(self.name, exc.strerror or str(exc)) from exc

    def close(self) -> None:
        pass


class BrokerAlertSink:
    """Alerts published to an MQTT topic or appended to a Redis stream."""

    def __init__(self, spec: str) -> None:
        from .sinks import MqttPredictionSink, RedisPredictionSink

        self._mqtt = scheme_of(spec).startswith("mqtt")
        kind = MqttPredictionSink if self._mqtt else RedisPredictionSink
        self._sink = kind(spec, what="alerts")
        self.name = self._sink.name

    def send(self, alerts: list[dict]) -> None:
        texts = [json.dumps(a, sort_keys=True) for a in alerts]
        if self._mqtt:
            self._sink.publish_texts(texts, "alerts")
        else:
            self._sink.append_entries([["id", a["id"], "alert", t]
                                       for a, t in zip(alerts, texts)], "alerts")

    def close(self) -> None:
        self._sink.close()


class HttpAlertSink:
    """Alerts POSTed one by one as JSON to a URL; any answer but 2xx is a failure."""

    def __init__(self, spec: str) -> None:
        parts = urllib.parse.urlsplit(spec)
        query = dict(urllib.parse.parse_qsl(parts.query))
        self.name = redacted(urllib.parse.urlunsplit(parts._replace(query="")))
        self._url = urllib.parse.urlunsplit(parts._replace(query=""))
        try:
            self._timeout = float(query.pop("timeout", 10.0))
        except ValueError:
            raise ConfigError(f"timeout must be a number of seconds, in {self.name!r}") \
                from None
        self._headers = {"Content-Type": "application/json"}
        variable = query.pop("header_env", None)
        if variable is not None:
            line = os.environ.get(variable)
            if not line or ":" not in line:
                raise ConfigError(f"header_env={variable}: the variable must hold a header "
                                  f"line 'Name: value'")
            key, value = line.split(":", 1)
            self._headers[key.strip()] = value.strip()
        if query:
            raise ConfigError(f"unknown option(s) {', '.join(sorted(query))} for alerts "
                              f"over HTTP (known: timeout, header_env)")

    def send(self, alerts: list[dict]) -> None:
        for alert in alerts:
            body = json.dumps(alert, sort_keys=True).encode("utf-8")
            request = urllib.request.Request(self._url, data=body, method="POST",
                                             headers=self._headers)
            try:
                with urllib.request.urlopen(request, timeout=self._timeout) as answer:
                    answer.read()
            except urllib.error.HTTPError as exc:
                raise _failed(self.name, f"the server answered {exc.code} {exc.reason}") \
                    from exc
            except (urllib.error.URLError, OSError) as exc:
                reason = getattr(exc, "reason", None) or exc
                raise _failed(self.name, str(reason)) from exc

    def close(self) -> None:
        pass


def open_alert_sink(spec: str) -> AlertSink:
    """The sink ``spec`` names: a URL (mqtt, mqtts, redis, rediss, http, https) or a
    file path."""
    scheme = scheme_of(spec) or ""
    if scheme in ("mqtt", "mqtts", "redis", "rediss"):
        return BrokerAlertSink(spec)
    if scheme in ("http", "https"):
        return HttpAlertSink(spec)
    if scheme:
        raise ConfigError(f"alerts go to a file, mqtt://, redis:// or http(s)://; got "
                          f"{scheme!r} in {redacted(spec)!r}")
    return FileAlertSink(spec)

