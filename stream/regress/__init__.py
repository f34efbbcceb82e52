"""The Hoeffding regression tree (Ikonomovska, Gama & Dzeroski, 2011).

==========  ==============================================================================
model       ``TreeRegressor``, ``ScoredValues``: the Python face
settings    ``RegressionSettings`` and the registries of criteria and leaf models
kernel      the compiled record loop: route, predict, learn, split
tables      the regression tree's tables: layouts, allocation, growth
splits      per-leaf split statistics: the exhaustive-threshold numeric statistic,
            category statistics
criteria    target statistics, variance and deviation reduction, the split test
nodes       node birth, statistic slots, detectors, alternates' life
drift       the error the detectors watch, the swap test
==========  ==============================================================================
"""

from stream.lazy import lazy_face

__getattr__, __all__ = lazy_face(__name__, {
    "TreeRegressor": "model", "ScoredValues": "model", "RegressionSettings": "settings"})
