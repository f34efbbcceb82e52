"""The grove: keyed learners (``sapwood learn --by``) spread over a Ray cluster.

One learner per Redis stream, each a detached, named Ray actor that Ray restarts on a
live node when its process or node dies; checkpoints and outputs live in a folder every
node shares. :mod:`.plan` says who learns what and where (no Ray needed), :mod:`.actor`
is the learner, :mod:`.control` starts, watches and stops the grove, :mod:`.gather` reads
every key's rules back. Ray is an optional extra: ``pip install "sapwood[grove]"``.
"""
