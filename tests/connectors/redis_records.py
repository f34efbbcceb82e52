"""Records the Redis stream tests write: a temperature and whether it is above 22, with
their number ``n`` (a one-feature step a tree learns exactly). Invented test data."""

from __future__ import annotations


def add_hot_records(client, stream: str, n: int, start: int = 0) -> None:
    """XADD records ``start`` .. ``start + n - 1`` to ``stream`` in one pipeline."""
    pipe = client.pipeline(transaction=False)
    for i in range(start, start + n):
        temp = 15 + (i * 7919) % 200 / 10.0
        pipe.xadd(stream, {"n": str(i), "temp": f"{temp:.1f}",
                           "hot": "yes" if temp > 22 else "no"})
    pipe.execute()


def learn_numbers(source) -> list[int]:
    """Every record's ``n`` the source hands out, each batch committed as a learner
    would after learning it; the source is closed after."""
    got: list[int] = []
    try:
        for batch in source.batches():
            got += batch.frame["n"].astype(int).tolist()
            source.commit(batch.position)
    finally:
        source.close()
    return got
