"""Randomised allocation of replicates to conditions, with blind codes (pure Python, no Django).

ARRIVE 2.0 items 4-5: record the method, the generator and its seed, and keep the realised list
itself (a seed does not reproduce across library versions). The experimental unit is the trial
(the dish), so the list has one entry per dish: its slot in the run order, a neutral code, the
condition and the replicate number within that condition.

- simple: all condition × replicate pairs shuffled together (complete randomisation of the run
  order); a condition may cluster early or late in the day.
- block: permuted blocks of one dish per condition, each block shuffled on its own; every
  condition is run once before any is run again, which spreads time-of-day effects evenly.
"""
from __future__ import annotations

import platform
import random

SIMPLE = "simple"
BLOCK = "block"
# No 0/O, 1/I/L, 2/Z, 5/S, 6/G, 8/B: codes are read aloud and written by hand.
CODE_ALPHABET = "ACDEFHJKMNPRTUVWXY3479"
CODE_LENGTH = 4
GENERATOR = f"Python {platform.python_version()} random.Random (Mersenne Twister)"


def allocate(conditions: list[str], replicates: int, method: str, seed: int) -> list[dict]:
    """[{slot, code, condition, replicate}, ...] in run order; deterministic for the same inputs."""
    labels = [c.strip() for c in conditions]
    if len(labels) < 1 or any(not c for c in labels):
        raise ValueError("Give at least one condition, each with a label.")
    if len(set(labels)) != len(labels):
        raise ValueError("Condition labels must be different from each other.")
    if replicates < 1:
        raise ValueError(f"Replicates per condition {replicates} is not possible: allowed range 1 or more.")
    rng = random.Random(seed)
    if method == SIMPLE:
        order = [(c, r) for c in labels for r in range(1, replicates + 1)]
        rng.shuffle(order)
    elif method == BLOCK:
        order = []
        for r in range(1, replicates + 1):
            block = [(c, r) for c in labels]
            rng.shuffle(block)
            order += block
    else:
        raise ValueError(f"Unknown allocation method {method!r}.")
    codes: set[str] = set()
    out = []
    for slot, (condition, replicate) in enumerate(order, start=1):
        code = "".join(rng.choice(CODE_ALPHABET) for _ in range(CODE_LENGTH))
        while code in codes:
            code = "".join(rng.choice(CODE_ALPHABET) for _ in range(CODE_LENGTH))
        codes.add(code)
        out.append({"slot": slot, "code": code, "condition": condition, "replicate": replicate})
    return out
