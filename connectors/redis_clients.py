"""A Redis client for one server or for a Redis Cluster, whichever the address is.

Any node of a cluster serves as its address: :func:`open_redis` asks the server
(``INFO cluster``, field ``cluster_enabled``) and, on a cluster, returns redis-py's
cluster-aware client, which keeps the map of hash slots and follows the server's MOVED
and ASK redirections (Redis Cluster specification: "Redirection and resharding").
Commands on one stream then go to the node that serves the stream's slot, wherever it
moves. A cluster has database 0 only.

Keys that must live on one node (a stream and its fencing token, see
:mod:`connectors.fencing`) share a hash tag: :func:`same_slot_key` builds one.
"""

from __future__ import annotations

from typing import Any

from stream.errors import ConfigError


def open_redis(host: str, port: int, db: int, display: str, **kwargs: Any):
    """(client, True when the server is a cluster node) for ``host:port``.

    ``kwargs`` go to the client (credentials, timeouts, TLS, ``retry``); ``protocol=2``
    is always set, so replies have the shapes the command documentation shows. The
    connection is checked with PING; errors are redis-py's.
    """
    import redis

    kwargs["protocol"] = 2
    plain = redis.Redis(host=host, port=port, db=db, **kwargs)
    try:
        plain.ping()
    except redis.ResponseError as exc:
        if "cluster mode" not in str(exc):
            raise
        plain.close()            # SELECT of database db was refused
        raise ConfigError(f"{display!r} is a Redis Cluster node; a cluster has database "
                          f"0 only, not {db}") from None
    if not _is_cluster(plain):
        return plain, False
    plain.close()
    from redis.cluster import RedisCluster

    kwargs.pop("client_name", None)  # set per node connection by the cluster client
    cluster = RedisCluster(host=host, port=port, **kwargs)
    cluster.ping(target_nodes=RedisCluster.RANDOM)
    return cluster, True


def _is_cluster(client) -> bool:
    import redis

    try:
        return bool(client.info("cluster").get("cluster_enabled"))
    except redis.ResponseError:  # INFO not allowed to this user: take a plain server
        return False


def node_of(client, key: str):
    """The plain client of the node serving ``key`` (the client itself on one server)."""
    from redis.cluster import RedisCluster

    if not isinstance(client, RedisCluster):
        return client
    node = client.get_node_from_key(key)
    if isinstance(node, list):
        node = node[0]
    return client.get_redis_connection(node)


def node_address(client) -> str:
    """host:port of a plain client's server."""
    kwargs = client.connection_pool.connection_kwargs
    return f"{kwargs.get('host')}:{kwargs.get('port')}"


def hash_tag(key: str) -> str | None:
    """The part of ``key`` that Redis Cluster hashes when it has one: the text between
    the first '{' and the next '}', if not empty (Redis Cluster specification, "Hash
    tags")."""
    start = key.find("{")
    if start < 0:
        return None
    end = key.find("}", start + 1)
    if end < 0 or end == start + 1:
        return None
    return key[start + 1:end]


def same_slot_key(key: str, suffix: str) -> str:
    """A key name made of ``key`` and ``suffix`` that hashes to ``key``'s slot.

    A key with a hash tag keeps it (``line:{7}`` -> ``line:{7}:suffix``); a key without
    one is wrapped in braces, which makes its whole name the tag (``line7`` ->
    ``{line7}:suffix``). A name whose braces are not a tag (``a{}b``) cannot be matched
    this way and is refused.
    """
    if hash_tag(key) is not None:
        return f"{key}:{suffix}"
    if "{" in key or "}" in key:
        raise ConfigError(f"stream name {key!r} has braces that are not a hash tag; name "
                          "it without braces or with a tag such as line:{{7}}")
    return f"{{{key}}}:{suffix}"
