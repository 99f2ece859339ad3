"""Transducer determinization run in a child process with memory and time limits.

- `GuardResult`: the determinized FST plus what the child measured.
- `FstHandoff`: an FST handed over to a stage that may drop it as soon as it is done
  with it (the guard drops its input once the child's input file is written).
- `determinize_guarded(ifst, max_memory, timeout, ...)`: determinizes in a child process.
- `precheck_determinizable(ifst, lfst=None, gfst=None)`: cheap sufficient conditions for
  failure, tested before the child starts.
- `python -m netbuild.guard IN OUT STATUS --max-memory N --det-type T`: the child.

OpenFst's `nstate` limit does not bound the determinization of a transducer: it
determinizes completely and prunes afterwards, silently. A non-determinizable input
therefore runs until memory runs out. The guard runs the work in a fresh Python process
(`subprocess`, so the limit does not count the parent's memory; the child imports only
pynini, the analyses in `netbuild.checks` are imported lazily) whose address space is
capped with RLIMIT_AS and which is killed after a wall-clock timeout. The FST goes to
and from the child as OpenFst binary files in a temporary directory.
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from typing import TYPE_CHECKING

import pynini
import pywrapfst

from .errors import DeterminizeError
from .memory import peak_rss, release_free_memory
from .symbols import BACKOFF

if TYPE_CHECKING:
    from .io.fstfile import FstArrays

# Exit codes of the child (besides 0 and signals).
_EXIT_MEMORY = 3
_EXIT_FSTERROR = 4
_MB = 1024 * 1024


@dataclasses.dataclass
class GuardResult:
    """The determinized FST, the child's peak resident memory and its wall time."""

    fst: pynini.Fst
    peak_rss_bytes: int
    seconds: float
    arrays: FstArrays | None = None  # `fst` as arrays, read from the child's const file


class FstHandoff:
    """Holds an FST that its receiver may drop: `take()` returns it and lets go of it.

    A pipeline passes its previous result this way when the next stage can release it
    early (the caller keeps no reference of its own), so the FST is freed as soon as
    the receiver drops it. Whoever else still refers to the FST keeps it alive.
    """

    __slots__ = ("_fst",)

    def __init__(self, fst: pynini.Fst) -> None:
        self._fst: pynini.Fst | None = fst

    def peek(self) -> pynini.Fst:
        """Returns the FST without forgetting it (for a look: keep no reference)."""
        if self._fst is None:
            raise RuntimeError("the FST of this handoff was already taken")
        return self._fst

    def take(self) -> pynini.Fst:
        """Returns the FST and forgets it; a second call raises `RuntimeError`."""
        fst, self._fst = self._fst, None
        if fst is None:
            raise RuntimeError("the FST of this handoff was already taken")
        return fst


def _likely_causes(lfst: pynini.Fst | None, gfst: pynini.Fst | None) -> str:
    """Names the most likely input cause of a determinization failure, cheaply."""
    from .checks import lexicon_pronunciations, unmarked_homophones, unmarked_prefixes

    if lfst is None:
        return ("the input is probably not functional, or not determinizable (two paths "
                "with the same input and different outputs or weights under a loop)")
    prons = lexicon_pronunciations(lfst)
    homophones = unmarked_homophones(lfst, gfst, prons)
    if homophones:
        shown = "; ".join(f"{' '.join(p)} = {', '.join(w)}" for p, w in homophones[:5])
        return f"the lexicon has homophones without disambiguation markers ({shown})"
    prefixes = unmarked_prefixes(lfst, prons)
    if prefixes:
        shown = "; ".join(f"{a!r} is a prefix of {b!r}" for a, b in prefixes[:5])
        return f"pronunciations are prefixes of others with no marker ending them ({shown})"
    if gfst is not None and gfst.input_symbols() is not None:
        if gfst.input_symbols().find(BACKOFF) == pynini.NO_SYMBOL:
            return (f"the model's back-off arcs carry no {BACKOFF!r} marker, so back-off "
                    "paths and direct paths read the same words with different weights")
    return ("the lexicon or model probably lacks disambiguation markers (homophones, "
            "prefix pronunciations) or the back-off marker pass-through")


def precheck_determinizable(ifst: pynini.Fst, lfst: pynini.Fst | None = None,
                            gfst: pynini.Fst | None = None) -> None:
    """Raises `DeterminizeError` at once when `ifst` certainly cannot be determinized.

    Sufficient conditions tested: a cycle of input-epsilon arcs in `ifst` (infinitely
    many outputs or weights for one input), and, when L is given, pronunciations that
    spell several words of G with no disambiguation marker (L∘G is then not functional).
    """
    from .checks import has_input_epsilon_cycle, unmarked_homophones

    cycle = has_input_epsilon_cycle(ifst)
    if cycle:
        raise DeterminizeError(
            "determinize", f"the input has a cycle of arcs with no input label (states "
            f"{cycle[:6]}), so it cannot be determinized",
            f"the back-off arcs probably carry epsilon instead of {BACKOFF!r}, or L lacks "
            "its back-off pass-through; rebuild G and L with netbuild's builders")
    if lfst is not None:
        homophones = unmarked_homophones(lfst, gfst)
        if homophones:
            shown = "; ".join(f"{' '.join(p)} = {', '.join(w)}" for p, w in homophones[:8])
            raise DeterminizeError(
                "determinize", f"L∘G is not functional: {len(homophones)} pronunciations "
                f"spell several words with no disambiguation marker ({shown})",
                "build the lexicon with disambiguation markers, or give these words "
                "different pronunciations")


def _limit_text(limit_bytes: int) -> str:
    return f"{limit_bytes / _MB:.0f} MB"


def determinize_guarded(ifst: pynini.Fst | FstHandoff, max_memory: int, timeout: float, *,
                        det_type: str = "functional", lfst: pynini.Fst | None = None,
                        gfst: pynini.Fst | None = None,
                        stage: str = "determinize", as_arrays: bool = False) -> GuardResult:
    """Constructively determinizes the tropical transducer `ifst` in a child process.

    Args:
        ifst: the FST to determinize (not changed); epsilon is treated as a label. Given
            as an `FstHandoff`, it is dropped (with its shared conversion) once the
            child's input file is written, so the parent does not hold it while the
            child runs; neither the error messages nor the checks after the stage use it.
        max_memory: address-space limit of the child, in bytes (RLIMIT_AS).
        timeout: wall-clock limit in seconds; the child is killed when it is reached.
        det_type: OpenFst's determinization type ("functional", "nonfunctional",
            "disambiguate").
        lfst, gfst: the L and G that `ifst` was composed from, if any; used by the
            pre-checks and to name the likely cause of a failure.
        stage: the stage name used in error messages.
        as_arrays: return the result as a `netbuild.io.fstfile.ArrayFst` of the arrays
            read from the child's file (no FST is built in this process).

    Returns:
        A `GuardResult` with the determinized FST (symbol tables kept).

    Raises:
        DeterminizeError: the pre-checks failed, or the child ran out of memory, hit the
            timeout, found the input non-functional, or crashed.
    """
    handed = isinstance(ifst, FstHandoff)
    if handed:
        ifst = ifst.take()
    precheck_determinizable(ifst, lfst, gfst)
    with tempfile.TemporaryDirectory(prefix="netbuild-det-") as tmp:
        ipath, opath, spath = (os.path.join(tmp, n) for n in ("in.fst", "out.fst",
                                                               "status.json"))
        isyms, osyms = (None if t is None else t.copy()
                        for t in (ifst.input_symbols(), ifst.output_symbols()))
        arc_type = ifst.arc_type()
        # An ArrayFst is written as a const file: OpenFst reads that layout about four
        # times faster than a vector file (0.56 s against 2.1 s for the 20k / 1M C∘LG).
        # (Imported here: the child, which runs this module, never needs numpy.)
        from .io.fstfile import (ArrayFst, arrays_to_fst, const_file_arrays, forget_shared,
                                 write_arrays)

        if isinstance(ifst, ArrayFst):
            write_arrays(ifst.arrays, ipath, "const")
        else:
            ifst.write(ipath)
        if handed:
            # The pre-check's conversion is the only other reference made here.
            forget_shared(ifst)
            del ifst
            release_free_memory()  # so the machine has it while the child runs
        cmd = [sys.executable, "-m", "netbuild.guard", ipath, opath, spath,
               "--max-memory", str(int(max_memory)), "--det-type", det_type, "--const"]
        started = time.monotonic()
        proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE,
                                start_new_session=True)
        try:
            _, err_bytes = proc.communicate(timeout=timeout)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.communicate()
            elapsed = time.monotonic() - started
            raise DeterminizeError(
                stage, f"hit the time limit of {timeout:g} s (stopped after "
                f"{elapsed:.1f} s); the input is probably not determinizable: "
                f"{_likely_causes(lfst, gfst)}",
                "fix the lexicon or model, or raise --determinize-timeout (determinize_timeout in [build]) if the graph is "
                "just large") from None
        except BaseException:
            # Ctrl-C or SIGTERM in the parent: the child runs in its own session and
            # would otherwise go on, orphaned and without its time limit.
            proc.kill()
            proc.wait()
            raise
        elapsed = time.monotonic() - started
        stderr = err_bytes.decode(errors="replace")
        status = {}
        if os.path.exists(spath):
            try:
                with open(spath, encoding="utf-8") as fh:
                    status = json.load(fh)
            except ValueError:  # a child that died while writing it
                status = {}
        code = proc.returncode
        if code == 0 and os.path.exists(opath):
            # The child wrote a const file: its arrays are read with numpy and the FST
            # is built from them, which is cheaper than reading the file as a vector
            # FST and converting that back to arrays for the checks (20k / 1M: 4.5 s).
            a = const_file_arrays(opath, isyms, osyms, arc_type)
            if as_arrays:
                ofst = ArrayFst(a)
                a = ofst.arrays
            else:
                ofst = arrays_to_fst(a.num_states, a.start, a.final_weights, a.src,
                                     a.ilabel, a.olabel, a.weight, a.dst, isymbols=isyms,
                                     osymbols=osyms, arc_type=arc_type)
            return GuardResult(ofst, int(status.get("peak_rss_bytes", 0)),
                               float(status.get("seconds", elapsed)), a)
    if code == _EXIT_MEMORY or "bad_alloc" in stderr or "MemoryError" in stderr:
        raise DeterminizeError(
            stage, f"ran out of its memory limit of {_limit_text(max_memory)} after "
            f"{elapsed:.1f} s; the input is probably not determinizable: "
            f"{_likely_causes(lfst, gfst)}",
            "fix the lexicon or model, or raise --determinize-max-memory (determinize_max_memory in [build]) if the graph is "
            "just large")
    if code == _EXIT_FSTERROR:
        detail = stderr.strip().splitlines()[0] if stderr.strip() else "FST error"
        raise DeterminizeError(
            stage, f"OpenFst stopped after {elapsed:.1f} s ({detail}); "
            f"{_likely_causes(lfst, gfst)}",
            "build the lexicon with disambiguation markers and G with back-off markers")
    how = f"signal {-code}" if code < 0 else f"exit code {code}"
    tail = " | ".join(stderr.strip().splitlines()[-3:])
    raise DeterminizeError(
        stage, f"the determinization process crashed ({how}) after {elapsed:.1f} s"
        + (f": {tail}" if tail else "") + f"; {_likely_causes(lfst, gfst)}",
        f"if the memory limit ({_limit_text(max_memory)}) is low, raise "
        "--determinize-max-memory; otherwise fix the lexicon or model")


def _child(argv: list[str] | None = None) -> int:
    """Runs in the child: reads IN, determinizes, writes OUT and a JSON STATUS."""
    parser = argparse.ArgumentParser(prog="python -m netbuild.guard")
    parser.add_argument("ifile")
    parser.add_argument("ofile")
    parser.add_argument("status")
    parser.add_argument("--max-memory", type=int, required=True)
    parser.add_argument("--det-type", default="functional")
    parser.add_argument("--const", action="store_true", help="write a const FST")
    args = parser.parse_args(argv)
    resource.setrlimit(resource.RLIMIT_CORE, (0, 0))
    resource.setrlimit(resource.RLIMIT_AS, (args.max_memory, args.max_memory))
    started = time.monotonic()
    try:
        ifst = pywrapfst.Fst.read(args.ifile)  # (vector or const, as written)
        ofst = pywrapfst.determinize(ifst, det_type=args.det_type)
        del ifst
        num_states = ofst.num_states()
        if args.const:
            ofst = pywrapfst.convert(ofst, "const")
        ofst.write(args.ofile)
    except MemoryError:
        return _EXIT_MEMORY
    except pywrapfst.FstError as err:
        print(f"FST error: {err}", file=sys.stderr)
        return _EXIT_FSTERROR
    with open(args.status, "w", encoding="utf-8") as fh:
        json.dump({"peak_rss_bytes": peak_rss(),
                   "seconds": time.monotonic() - started,
                   "states": num_states}, fh)
    return 0


if __name__ == "__main__":
    sys.exit(_child())
