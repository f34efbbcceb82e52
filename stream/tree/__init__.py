"""What both trees share: the node layout and the compiled operations on it, the drift
detectors, the Hoeffding bound, the paths from the root to a node, and the Python upkeep
around kernel calls.

==========  ==============================================================================
layout      node columns, statuses, events, counters, the feature map; allocating and
            growing node, detector and event tables
kernel      compiled node operations: routing, leaf birth, slot release, subtree death,
            swap, recycling, the event buffer
drift       ADWIN and Page-Hinkley as compiled functions over detector tables
bound       the Hoeffding bound
paths       ``Condition``; the conditions on the way to a node; drift state of a path
settings    the detector registry, drift checks, the dict round trip of settings
views       read-only views of the main tree (root, nodes, size, depth)
upkeep      ``DriftEvent``; the kernel-call loop, event collection, table growth
==========  ==============================================================================

This wing imports only the ground floor (``stream.errors``, ``stream.checks``,
``stream.jit``); nothing here is public beyond ``Condition``, which ``stream.rules``
re-exports.
"""
