"""Child process for test_tampered_models: random edits of a saved model's arrays,
re-signed, then load, rules, predict and learn; prints one line per trial.

Run as ``python -m tests.run.tampered_models MODEL SEED TRIALS``. A crash (segfault,
heap abort) or a hang shows as the process's exit status or its timeout in the parent.
"""

from __future__ import annotations

import faulthandler
import sys

import numpy as np

from stream.errors import SapwoodError
from stream.run.model_file import read_model_file, write_model_file
from stream.run.saved_model import MODEL_KIND, load_model

EDGE_INTS = (-1, 0, 1, 2, 3, -(2 ** 31), 2 ** 20)
EDGE_FLOATS = (np.nan, np.inf, -1.0, 0.0, 1e300, -1e300, 5.0)


def edit(arrays: dict, rng: np.random.Generator) -> str:
    """Change one to three cells of one array, in place; returns the array's name."""
    names = sorted(k for k, v in arrays.items() if v.size)
    name = names[int(rng.integers(len(names)))]
    flat = arrays[name].reshape(-1)
    for _ in range(int(rng.integers(1, 4))):
        i = int(rng.integers(flat.size))
        if flat.dtype.kind in "iu":
            size = arrays[name].shape[0]
            value = int(rng.choice(EDGE_INTS + (size, size - 1, int(flat.max()) + 1)))
            info = np.iinfo(flat.dtype)
            flat[i] = min(max(value, info.min), info.max)
        elif flat.dtype.kind == "f":
            flat[i] = EDGE_FLOATS[int(rng.integers(len(EDGE_FLOATS)))]
        elif flat.dtype.kind == "b":
            flat[i] = not flat[i]
    return name


def main(model: str, seed: int, trials: int, scratch: str) -> None:
    faulthandler.enable()
    meta, arrays = read_model_file(model)
    saved = load_model(model)
    X = np.zeros((50, len(saved.schema.feature_names)))
    rng = np.random.default_rng(seed)
    for trial in range(trials):
        edited = {k: v.copy() for k, v in arrays.items()}
        name = edit(edited, rng)
        write_model_file(scratch, MODEL_KIND, meta, edited)
        print(f"trial {trial}: {name}", flush=True)
        try:
            loaded = load_model(scratch)
        except SapwoodError:
            continue                                  # refused with a message: good
        loaded.task.rules(loaded.encoder.categories)
        loaded.model.predict(X)


if __name__ == "__main__":
    main(sys.argv[1], int(sys.argv[2]), int(sys.argv[3]), sys.argv[4])
