"""Bounded, safe YAML reading for every YAML file fieldrun reads (dialects, rig and
protocol copies in run folders, simulated-rig files).

``LimitedLoader`` is a ``yaml.SafeLoader`` whose composer counts nesting depth and alias
uses, so a hostile or broken file (deep nesting, alias bombs, a self-referencing alias)
fails at once instead of exhausting the stack or the memory. ``load_limited`` adds a size
cap and returns plain Python data (safe types only: no tags that construct objects).
The protocol checker (``sequencer.yamlsafe``) composes with the same loader and keeps
positions on top of it.
"""
from __future__ import annotations

from typing import Any

import yaml
from yaml.composer import Composer
from yaml.events import AliasEvent, MappingStartEvent, SequenceStartEvent

MAX_BYTES = 1_000_000
MAX_DEPTH = 32
MAX_ALIASES = 100


class YamlLimit(Exception):
    """A limit was exceeded; ``mark`` is the yaml mark where (may be None)."""

    def __init__(self, message: str, mark=None):
        super().__init__(message)
        self.message = message
        self.mark = mark


class LimitedLoader(yaml.SafeLoader):
    """A SafeLoader whose composer counts depth and alias uses (the composer of PyYAML is
    recursive; the limits keep it far from Python's recursion limit)."""

    def __init__(self, stream):
        super().__init__(stream)
        self._depth = 0
        self._aliases = 0

    def compose_node(self, parent, index):
        if self.check_event(AliasEvent):
            self._aliases += 1
            if self._aliases > MAX_ALIASES:
                event = self.peek_event()
                raise YamlLimit(f"more than {MAX_ALIASES} alias uses", event.start_mark)
            return Composer.compose_node(self, parent, index)
        nests = self.check_event(MappingStartEvent) or self.check_event(SequenceStartEvent)
        if nests:
            self._depth += 1
            if self._depth > MAX_DEPTH:
                event = self.peek_event()
                raise YamlLimit(f"nesting deeper than {MAX_DEPTH} levels", event.start_mark)
        try:
            return Composer.compose_node(self, parent, index)
        finally:
            if nests:
                self._depth -= 1


def load_limited(text: str) -> Any:
    """Plain data from ``text`` (safe types only), within the size, depth and alias limits.
    Raises ``YamlLimit`` for a limit and ``yaml.YAMLError`` for a syntax error."""
    if len(text) > MAX_BYTES:
        raise YamlLimit(f"file is larger than {MAX_BYTES} bytes")
    loader = LimitedLoader(text)
    try:
        return loader.get_single_data()
    except RecursionError:
        raise YamlLimit("nesting too deep") from None
    finally:
        loader.dispose()
