"""The live sources by URL scheme: ``mqtt[s]://`` topics, ``redis[s]://`` streams and
``opc.tcp://`` OPC UA variables.

The registry sits above the broker sources and what they share
(:mod:`connectors.broker_payloads`), so that a new broker is one opener and one line.
"""

from __future__ import annotations

from typing import Any, Callable, Sequence

from stream.errors import ConfigError

from .base import Source
from .broker_payloads import redacted, scheme_of


def _open_mqtt(spec: str, batch_rows: int, **options: Any) -> Source:
    from .mqtt import MqttSource
    return MqttSource(spec, batch_rows, **options)


def _open_redis(spec: str, batch_rows: int, **options: Any) -> Source:
    from .redis_streams import RedisStreamSource
    return RedisStreamSource(spec, batch_rows, **options)


def _open_opcua(spec: str, batch_rows: int, **options: Any) -> Source:
    try:
        import asyncua  # noqa: F401  (the optional extra)
    except ImportError:
        raise ConfigError("reading OPC UA needs asyncua: pip install \"sapwood[plant]\"") \
            from None
    from .opcua import OpcUaSource
    return OpcUaSource(spec, batch_rows, **options)


BROKERS: dict[str, Callable[..., Source]] = {
    "mqtt": _open_mqtt,
    "mqtts": _open_mqtt,
    "redis": _open_redis,
    "rediss": _open_redis,
    "opc.tcp": _open_opcua,
}
"""URL scheme -> opener ``(spec, batch_rows, **options) -> Source``. The client library
of a broker is imported only when a source of its kind is opened."""


def is_broker_spec(spec: str) -> bool:
    """True when ``spec`` is a URL whose scheme is in ``BROKERS``."""
    return scheme_of(spec) in BROKERS


def open_broker(spec: str, batch_rows: int = 65536, **options: Any) -> Source:
    """Open the broker source a URL names.

    Parameters
    ----------
    spec
        ``mqtt[s]://[user:password@]host[:port]/topic/filter?client_id=...`` or
        ``redis[s]://[user:password@]host[:port][/db]?stream=...&group=...&consumer=...``.
    batch_rows
        Most records per batch.
    **options
        Source options, overriding the URL's query options of the same name.

    Raises
    ------
    ConfigError
        Unknown scheme or a bad option (messages show the redacted spec).
    InputError
        The broker cannot be reached or refuses the connection.
    """
    scheme = scheme_of(spec)
    if scheme not in BROKERS:
        raise ConfigError(f"broker scheme must be one of {', '.join(sorted(BROKERS))}, "
                          f"got {scheme!r} in {redacted(spec)!r}")
    return BROKERS[scheme](spec, batch_rows, **options)


def open_broker_sources(specs: Sequence[str], batch_rows: int) -> Source | None:
    """The hook for ``open_sources``: the broker source when ``specs`` names one, else None.

    A broker source is live and never ends on its own, so it must be the only source.
    """
    brokers = [s for s in specs if is_broker_spec(s)]
    if not brokers:
        return None
    if len(specs) != 1:
        raise ConfigError("a live source (mqtt://, redis://, opc.tcp://) must be the only "
                          "source, "
                          f"got {len(specs)} sources")
    return open_broker(brokers[0], batch_rows)
