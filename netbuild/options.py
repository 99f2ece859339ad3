"""Settings that travel through the library in frozen dataclasses.

The CLI builds these from the project file and flags (flags win); the library
never reads flags or the environment.

- `LexiconOptions`: how to read and compile the lexicon.
- `GrammarOptions`: how to compile the language model.
- `BuildOptions`: the pipeline's stages, checks and resource guards.
"""

from __future__ import annotations

import dataclasses
from typing import Literal

LexiconLayout = Literal["plain", "cmudict"]
OovPolicy = Literal["drop", "unk", "fail"]
FstType = Literal["vector", "const"]
WordGraphMethod = Literal["tree", "compose"]


@dataclasses.dataclass(frozen=True)
class LexiconOptions:
    layout: LexiconLayout = "plain"
    has_probabilities: bool = False  # declared by the project, never guessed
    keep_stress: bool = True  # cmudict layout: keep the stress digits on vowels
    rescale_probabilities: bool = True  # each word's most likely pronunciation costs 0
    silence_probability: float = 0.5  # optional silence between words and at the edges; 0 disables


@dataclasses.dataclass(frozen=True)
class GrammarOptions:
    oov_policy: OovPolicy = "drop"  # model words the lexicon lacks


@dataclasses.dataclass(frozen=True)
class BuildOptions:
    lexicon: LexiconOptions = LexiconOptions()
    grammar: GrammarOptions = GrammarOptions()
    push_weights: bool = True  # log-semiring weight pushing of the word-level graph
    checks: bool = True  # --fast turns the per-stage checks off
    fst_type: FstType = "vector"
    determinize_max_memory: int = 8 * 1024**3  # bytes; child-process limit
    determinize_timeout: float = 1800.0  # seconds
    max_memory: int = 0  # bytes; stop before a stage estimated to need more; 0: no limit
    transition_scale: float = 1.0  # full graph: multiplies the HMM self-loop and exit costs
    final_optimize: bool = True  # full graph: determinize and minimize H∘C∘L∘G
    # full graph: at the model level, weights that round to the same multiple of this
    # count as equal when minimizing (0: bit for bit); see netbuild.refine
    weight_quantum: float = 1e-4
    # The word-level graph: "tree" builds det(L∘G) directly from G's arcs and the
    # pronunciations (netbuild.lextree), falling back to "compose" (OpenFst's
    # composition and determinization) where its preconditions do not hold.
    word_graph: WordGraphMethod = "tree"
    # Library only (no project key): determinize without the guard's child process.
    # The size prediction's sub-builds use it; they are small shares of a model whose
    # own build is guarded, and each child would cost about half a second to start.
    determinize_in_process: bool = False
