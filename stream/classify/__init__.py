"""The Hoeffding tree classifier (Domingos & Hulten, KDD 2000).

==========  ==============================================================================
model       ``TreeClassifier``, ``Scored``: the Python face
settings    ``TreeSettings`` and the registries of criteria, leaf models, numeric splits
kernel      the compiled record loop: route, score, watch drift, learn, split, alternates,
            memory budget
tables      the classifier's tables (struct-of-arrays): layouts, allocation, growth
splits      per-leaf split statistics: Gaussian, quantile histogram, category counts
criteria    information gain, Gini, their ranges
==========  ==============================================================================
"""

from stream.lazy import lazy_face

__getattr__, __all__ = lazy_face(__name__, {
    "TreeClassifier": "model", "Scored": "model", "TreeSettings": "settings"})
