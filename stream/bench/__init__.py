"""The benchmark: throughput, memory and prequential quality against river, same run.

``sapwood bench`` prints ratios and says whether each target is met; it asserts
nothing, because the machines it runs on are shared and noisy and a timing is a fact of
one run, not a test outcome. Suites are registered by name in
:data:`stream.bench.common.SUITES` (a later suite is one decorated function); each takes
a :class:`~stream.bench.common.Bench` (sizes, seed, clock, progress sink, scratch
directory) and returns a :class:`~stream.bench.common.SuiteResult` (rows, target checks,
notes).

learners
    river's synthetic generators (SEA, Agrawal, rotating Hyperplane, Random RBF with 10
    and 100 features, LED), each generated once; river's ``HoeffdingTreeClassifier`` and
    sapwood's :class:`~stream.classify.TreeClassifier` learn the same records
    prequentially (score, then learn), paired by leaf model.
end-to-end
    ``sapwood learn -`` on a 1M-row CSV on stdin against a bare ``pandas.read_csv`` of
    the same file, in the same run.
memory
    Peak memory of ``sapwood learn -`` reading 200k and 2M rows through a pipe, and 200k
    rows with a category holding a different value in every row.
feed-path
    For each learner stream: the in-memory rate against ``sapwood learn FILE`` and
    ``sapwood learn -`` on the same records, drift off and ADWIN, and a bare
    ``pandas.read_csv`` (:mod:`stream.bench.feed_path`).
feeds
    Records/s from a file, a Redis stream and an MQTT topic, and the cost of a checkpoint
    every 10,000 records (:mod:`stream.bench.feeds`).
false-changes
    Alarms, alternates started and swaps per 1M records of stationary streams (four
    classification generators and Friedman #1), sapwood's defaults
    (:mod:`stream.bench.false_changes`).
rules
    Seconds to join and to compare the rules of a bushy tree (about 80,000 rules from 1M
    rows), and for ``sapwood notes`` and ``sapwood report`` on them
    (:mod:`stream.bench.rules`).

How memory is measured: Linux keeps a child's ``ru_maxrss`` across ``exec``, starting
from the resident size of the process it was forked (or vforked) from, so ``wait4`` and
``RUSAGE_CHILDREN`` report the benchmark's own peak whenever that is the larger one.
Peaks here are therefore the child's ``VmHWM`` (the high-water mark of its own address
space) read from ``/proc`` every 5 ms while it runs; growth in its last few
milliseconds could be missed. Linux only; 1 MB = 10^6 bytes.

Modules: ``common`` (bench, results, registry), ``streams`` (the generated streams),
``learners`` (the learners, drift and regression suites, in memory), ``regression``
(regression streams and river's regression trees), ``end_to_end`` (the end-to-end and
memory suites, ``sapwood learn`` as a child process), ``feed_path``, ``feeds`` (live
feeds), ``rules``, ``false_changes``
(the rule views),
``output`` (text, Markdown and JSON of the results), ``command`` (``sapwood bench``).
"""
