"""docs/protocol-reference.md is current: it contains the step tables exactly as the code
writes them (sequencer.protocol.steps_markdown), and names every step kind, every key and
every rig-file key. (The source of truth is the STEP_KINDS table itself.)"""
from pathlib import Path

from sequencer import rig
from sequencer.protocol import COMMON_KEYS, STEP_KINDS, TOP_KEYS, steps_markdown

DOC = (Path(__file__).resolve().parents[1] / "docs" / "protocol-reference.md").read_text()


def test_step_tables_are_current():
    assert steps_markdown() in DOC, "regenerate with: python -m sequencer.protocol"


def test_every_key_is_documented():
    for kind in STEP_KINDS.values():
        assert f"### `{kind.name}`" in DOC
        for key in kind.keys + COMMON_KEYS:
            assert f"`{key.name}`" in DOC
    for key in TOP_KEYS + rig.TOP_KEYS + rig.INSTRUMENT_KEYS + tuple(rig.HARD_LIMITS):
        assert f"`{key}`" in DOC, key
