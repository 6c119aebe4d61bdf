"""The example node of DEVELOPERS.md ("The node contract") keeps the contract it
illustrates: the same output in any block sizes, and a stream cut anywhere,
its state pickled and handed to a freshly opened node, continues bit for bit."""

from __future__ import annotations

import pickle
import re
from pathlib import Path

import numpy as np
import pytest

from streamq.engine import Packet, SignalBlock, StreamSpec

DOC = Path(__file__).resolve().parents[1] / "DEVELOPERS.md"


@pytest.fixture(scope="module")
def example():
    text = DOC.read_text()
    section = text[text.index("## The node contract"):text.index("## Adding a node kind")]
    code = re.findall(r"```python\n(.*?)```", section, re.S)
    assert len(code) == 1, "the node contract shows one example node"
    from streamq.engine import registry
    names: dict = {"__name__": "developers_example"}
    saved = dict(registry._kinds)
    exec(compile(code[0], str(DOC), "exec", dont_inherit=True), names)
    yield names["DcRemove"], names["DcRemoveConfig"]
    registry._kinds.clear()          # the example kind is not left registered
    registry._kinds.update(saved)


def _run(example, x, sizes, cut=None):
    node_cls, cfg_cls = example

    def fresh():
        node = node_cls("dc", cfg_cls(use="dc-remove", input="feed"))
        node.open({"input": StreamSpec("signal", 48_000, x.shape[1])}, None)
        return node

    node, out, pos, i = fresh(), [], 0, 0
    while pos < len(x):
        if pos == cut:
            state = pickle.loads(pickle.dumps(node.get_state()))
            node = fresh()
            node.set_state(state)
        k = min(sizes[i % len(sizes)], len(x) - pos, (cut - pos) if cut and pos < cut else len(x))
        i += 1
        out.append(node.step(k, {"input": Packet(SignalBlock(x[pos:pos + k], pos, 48_000))})
                   .block.data)
        pos += k
    return np.concatenate(out)


def test_example_node_is_block_size_invariant_and_continues_from_its_state(example):
    x = np.random.default_rng(1).standard_normal((5_000, 2)) + 0.3
    whole = _run(example, x, [len(x)])
    for sizes in ([1], [7], [256], [65_536], [3, 100, 17]):
        np.testing.assert_array_equal(_run(example, x, sizes), whole)
    for cut in (1, 1001, 4999):
        np.testing.assert_array_equal(_run(example, x, [7], cut=cut), whole)
    # the DC offset is gone once the filter has settled (common practice: a one-pole
    # high-pass has zero gain at DC)
    assert abs(whole[-1000:].mean()) < 0.05
