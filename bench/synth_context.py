"""Synthetic triphone context maps for the full-graph benchmarks.

- `synth_context_map(...) -> str`: the text of a context map over bench/synth.py's phones.
- `write_context_map_text(path, ...)`: writes it.
- `main(argv)`: ``python bench/synth_context.py --out bench/out/w20k_n1m/context.txt``

The map (netbuild's context-map format, see `netbuild.io.context_map`):

- widths 1 1; the silence and noise phones are context-independent and are not
  context for their neighbours (the neighbours see the edge ``$``);
- every model has three emitting states, left to right;
- a generated decision list: for each of the 40 centre phones, one rule per (left side,
  right side), where a side is one of the five `PHONE_GROUPS` classes (``@cgA`` ...) or
  the edge ``$``: 36 rules per centre; then a catch-all ``* c *`` per centre;
- tying: the first state of model (c, l, r) is shared by every model of centre c with
  the same left side l, the last state by the same right side r, the middle state is
  the model's own. Per centre that is 6 + 36 + 6 emission classes, plus 3 for the
  catch-all: 51 x 40 + 3 + 3 (silence, noise) = 2,046 classes, ids 0..2045.

Since the five groups partition the phone set and ``$`` is the only other visible
context, the group rules cover every occurring context; the catch-all only guarantees
it. Self-loop probabilities are drawn from a seeded generator (reproducible bytes).
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from synth import NOISE_PHONE, PHONE_GROUPS, PHONES, SILENCE_PHONE  # noqa: E402

EDGE_SIDE = "$"


def _sides() -> list[str]:
    return [f"@{g}" for g in PHONE_GROUPS] + [EDGE_SIDE]


def _side_name(side: str) -> str:
    return "edge" if side == EDGE_SIDE else side[1:]


def synth_context_map(seed: int = 0) -> str:
    """Returns the context-map text described in the module docstring.

    Args:
        seed: seed of the generator drawing each class's self-loop probability
            (uniform in [0.45, 0.75], two decimals; forward = 1 - self-loop).
    """
    rng = np.random.default_rng(seed)
    sides = _sides()
    n_side = len(sides)
    per_centre = n_side + n_side * n_side + n_side + 3
    n_classes = per_centre * len(PHONES) + 6
    loops = np.round(rng.uniform(0.45, 0.75, size=n_classes), 2)

    def state(cls: int) -> str:
        p = float(loops[cls])
        return f"{cls}:{p:g}:{round(1.0 - p, 2):g}"

    lines = ["# synthetic triphone context map for the benchmarks (bench/synth_context.py)",
             "widths 1 1", f"independent {SILENCE_PHONE} {NOISE_PHONE}",
             "independent-context no", ""]
    models: list[str] = []
    rules: list[str] = []
    for ci, centre in enumerate(PHONES):
        base = ci * per_centre
        first = {s: base + i for i, s in enumerate(sides)}
        last = {s: base + n_side + n_side * n_side + i for i, s in enumerate(sides)}
        for li, left in enumerate(sides):
            for ri, right in enumerate(sides):
                middle = base + n_side + li * n_side + ri
                name = f"{centre}.{_side_name(left)}.{_side_name(right)}"
                models.append(f"model {name} {state(first[left])} {state(middle)} "
                              f"{state(last[right])}")
                rules.append(f"rule {left} {centre} {right} -> {name}")
        c0 = base + per_centre - 3
        models.append(f"model {centre}.any {state(c0)} {state(c0 + 1)} {state(c0 + 2)}")
        rules.append(f"rule * {centre} * -> {centre}.any")
    top = per_centre * len(PHONES)
    for k, phone in enumerate((SILENCE_PHONE, NOISE_PHONE)):
        c0 = top + 3 * k
        models.append(f"model {phone} {state(c0)} {state(c0 + 1)} {state(c0 + 2)}")
        rules.append(f"rule * {phone} * -> {phone}")
    return "\n".join(lines + models + [""] + rules) + "\n"


def write_context_map_text(path: str | Path, seed: int = 0) -> None:
    """Writes `synth_context_map(seed)` to `path` (UTF-8)."""
    Path(path).write_text(synth_context_map(seed), encoding="utf-8")


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", required=True, help="output file (context.txt)")
    ap.add_argument("--seed", type=int, default=0)
    args = ap.parse_args(argv)
    write_context_map_text(args.out, args.seed)
    return 0


if __name__ == "__main__":
    sys.exit(main())
