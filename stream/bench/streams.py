"""The streams the in-memory suites learn: river's generators, each generated once and
shared by both learners, stationary and drifting."""

from __future__ import annotations

import dataclasses
from typing import Callable, Iterable

import numpy as np

from stream.errors import SapwoodError


def _synth():
    from river.datasets import synth
    return synth


@dataclasses.dataclass(frozen=True)
class StreamSpec:
    """A river generator with fixed parameters; ``make(seed)`` returns a fresh one."""

    title: str
    make: Callable[[int], Iterable]
    nominal: tuple[str, ...] = ()
    min_ratio: float = 100.0


STREAMS: dict[str, StreamSpec] = {
    "sea": StreamSpec(
        "SEA variant 0, 10% label noise (Street & Kim 2001)",
        lambda seed: _synth().SEA(variant=0, noise=0.1, seed=seed)),
    # Function 2 (a salary band per age group) needs a tree of some depth and has
    # balanced classes (P(y=1) = 0.53); elevel, car and zipcode are categories in river's
    # documentation of the generator and are declared nominal on both sides.
    "agrawal": StreamSpec(
        "Agrawal function 2 (Agrawal et al. 1993), elevel/car/zipcode nominal",
        lambda seed: _synth().Agrawal(classification_function=2, seed=seed),
        nominal=("elevel", "car", "zipcode")),
    "hyperplane": StreamSpec(
        "rotating Hyperplane, 10 features, 2 drifting, mag_change 0.001, noise 0.05 "
        "(Hulten et al. 2001)",
        lambda seed: _synth().Hyperplane(seed=seed, n_features=10, n_drift_features=2,
                                         mag_change=0.001, noise_percentage=0.05)),
    "rbf10": StreamSpec(
        "Random RBF, 10 features, 2 classes, 50 centroids",
        lambda seed: _synth().RandomRBF(seed_model=seed, seed_sample=seed + 1, n_classes=2,
                                        n_features=10, n_centroids=50)),
    "rbf100": StreamSpec(
        "Random RBF, 100 features, 2 classes, 50 centroids",
        lambda seed: _synth().RandomRBF(seed_model=seed, seed_sample=seed + 1, n_classes=2,
                                        n_features=100, n_centroids=50),
        min_ratio=50.0),
    "led": StreamSpec(
        "LED, 10% segment noise, 17 irrelevant features (Breiman et al. 1984)",
        lambda seed: _synth().LED(seed=seed, noise_percentage=0.1, irrelevant_features=True)),
}
"""Learner streams by name. Targets: records/s ratio >= ``min_ratio`` (default leaf
models), and sapwood's default accuracy >= river's default."""


@dataclasses.dataclass(frozen=True)
class Pairing:
    """A sapwood leaf model and drift detector, and the river ``leaf_prediction`` of the
    HoeffdingTreeClassifier it is compared with."""

    sapwood: str
    river: str
    targets: bool
    detector: str = "off"


PAIRINGS: dict[str, Pairing] = {
    "defaults": Pairing("adaptive", "nba", True, "off"),
    "majority": Pairing("majority", "mc", False, "off"),
    "with-drift": Pairing("adaptive", "nba", False, "adwin"),
}
"""Pairings against river's plain Hoeffding tree. The targets sit on the default leaf
models of both with drift watching off on sapwood's side (river's
HoeffdingTreeClassifier has none): the same algorithm, like for like. ``with-drift`` is
sapwood's out-of-the-box setting (ADWIN at every node), shown for its cost; its fair
comparison is the ``drift`` suite against river's adaptive tree."""


@dataclasses.dataclass
class LabeledStream:
    """One generated stream, held both ways: arrays for sapwood and, for the leading
    records river is timed on, river's own ``(x, y)`` pairs."""

    names: list[str]
    kinds: list[str]
    X: np.ndarray
    y: np.ndarray
    classes: list[str]
    pairs: list[tuple[dict, object]]


def make_stream(spec: StreamSpec, records: int, keep: int, seed: int) -> LabeledStream:
    """Draw ``records`` records from ``spec`` once; keep river's pairs for the first ``keep``.

    Nominal features become integer codes in first-seen order and class labels become
    codes of their text in first-seen order, as sapwood's encoder does.
    """
    X = None
    y = np.empty(records, np.int32)
    pairs: list[tuple[dict, object]] = []
    classes: dict[str, int] = {}
    codes: dict[str, dict] = {k: {} for k in spec.nominal}
    keys: list = []
    n = 0
    for x, label in spec.make(seed).take(records):
        if X is None:
            keys = list(x)
            X = np.empty((records, len(keys)))
        X[n] = [codes[k].setdefault(x[k], len(codes[k])) if k in codes else x[k]
                for k in keys]
        y[n] = classes.setdefault(str(label), len(classes))
        if n < keep:
            pairs.append((x, label))
        n += 1
    if X is None:
        raise SapwoodError("the generator produced no records")
    kinds = ["category" if k in codes else "numeric" for k in keys]
    return LabeledStream([str(k) for k in keys], kinds, X[:n], y[:n], list(classes), pairs)


def _concept_switches(synth, seed: int, records: int):
    """SEA with abrupt switches of variant (theta 8 -> 9 -> 7) at 1/3 and 2/3."""
    third = records // 3
    width = max(1, third // 170 + 1)   # river's ConceptDriftStream overflows below this
    inner = synth.ConceptDriftStream(stream=synth.SEA(variant=1, noise=0.1, seed=seed + 1),
                                     drift_stream=synth.SEA(variant=2, noise=0.1,
                                                            seed=seed + 2),
                                     position=third, width=width, seed=seed + 3)
    return synth.ConceptDriftStream(stream=synth.SEA(variant=0, noise=0.1, seed=seed),
                                    drift_stream=inner, position=third, width=width,
                                    seed=seed + 4)


DRIFT_STREAMS: dict[str, Callable[[int, int], Iterable]] = {
    "sea-switches": lambda seed, n: _concept_switches(_synth(), seed, n),
    "agrawal-gradual": lambda seed, n: _synth().ConceptDriftStream(
        stream=_synth().Agrawal(classification_function=0, seed=seed),
        drift_stream=_synth().Agrawal(classification_function=2, seed=seed + 1),
        position=n // 2, width=5000, seed=seed + 2),
    "rbf-drift": lambda seed, n: _synth().RandomRBFDrift(
        seed_model=seed, seed_sample=seed + 1, n_classes=2, n_features=10,
        change_speed=0.0001, n_drift_centroids=50),
    "hyperplane-drift": lambda seed, n: _synth().Hyperplane(
        seed=seed, n_features=10, mag_change=0.001, noise_percentage=0.05),
}
"""Drifting streams (issue: SEA with concept switches, Agrawal with a gradual function
switch of width 5000, RandomRBFDrift, Hyperplane with mag_change)."""
