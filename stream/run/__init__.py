"""A learning run: records in, scored then learned, outputs and state out.

==============  ==========================================================================
engine          ``LearnJob``, ``LearnRun``, ``run_learn``: one run from its sources to its
                summary
schema          field kinds, ``Schema``, inference from a prefix, the schema file
values          what is missing, a number, a time or a label
encoding        ``Encoder``: raw batches to arrays; bad values to the quarantine
tasks           classification and regression behind one face
metrics         prequential scores: cumulative, windowed, fading
snapshots       the snapshot directory: index, retention, history, schedule
checkpoint      the checkpoint file: state plus source position, resume
delayed_labels  records waiting for labels that come later
scoring         ``sapwood score``: predictions from a saved model
saved_model     what a model file holds; ``model_file`` the container; ``atomic`` writes
==============  ==========================================================================
"""

from stream.lazy import lazy_face

__getattr__, __all__ = lazy_face(__name__, {
    "LearnJob": "job", "LearnRun": "engine", "run_learn": "engine", "Schema": "schema",
    "load_model": "saved_model"})
