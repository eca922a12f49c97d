"""SCPI header patterns of the simulated bench: compiling "[SENSe]:FREQuency:CENTer" notation into
nodes and matching a received header against them.

SCPI-1999 volume 1 ch. 6 (header syntax), cited from memory.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

from tonebench.sim.scpi_errors import SYNTAX_ERROR, scpi_error


@dataclass(frozen=True)
class HeaderNode:
    """One node of a registered header pattern."""

    short: str
    long: str
    optional: bool
    takes_suffix: bool

    def suffix_state(self, suffix: int | None) -> int:
        """2: accepted, 1: node matches but suffix out of range, 0: node does not take a suffix."""
        if suffix is None:
            return 2
        if not self.takes_suffix:
            return 0
        return 2 if suffix == 1 else 1


_PATTERN_TOKEN = re.compile(r"\[|\]|:|([A-Za-z]+)(#?)")
_RECEIVED_NODE = re.compile(r"([A-Za-z][A-Za-z_]*?)(\d*)")


def compile_pattern(pattern: str) -> tuple[HeaderNode, ...]:
    """Turn "[SENSe]:FREQuency:CENTer" style notation into nodes; bad patterns are programming errors."""
    nodes: list[HeaderNode] = []
    depth = 0
    pos = 0
    while pos < len(pattern):
        match = _PATTERN_TOKEN.match(pattern, pos)
        if match is None:
            raise ValueError(f"SCPI pattern {pattern!r}: unexpected {pattern[pos]!r} at {pos}")
        token = match.group(0)
        if token == "[":
            depth += 1
        elif token == "]":
            depth -= 1
            if depth < 0:
                raise ValueError(f"SCPI pattern {pattern!r}: unbalanced ']'")
        elif token != ":":
            word = match.group(1)
            short = "".join(c for c in word if c.isupper())
            if not short or not word.upper().startswith(short):
                raise ValueError(f"SCPI pattern {pattern!r}: node {word!r} needs a leading uppercase short form")
            nodes.append(HeaderNode(short, word.upper(), depth > 0, match.group(2) == "#"))
        pos = match.end()
    if depth != 0 or not nodes:
        raise ValueError(f"SCPI pattern {pattern!r}: unbalanced '[' or no node")
    return tuple(nodes)


def match_header(pattern: tuple[HeaderNode, ...], received: tuple[tuple[str, int | None], ...]) -> int:
    """2: match, 1: match except a numeric suffix out of range, 0: no match."""
    if not pattern:
        return 2 if not received else 0
    node, rest = pattern[0], pattern[1:]
    best = match_header(rest, received) if node.optional else 0
    if best < 2 and received:
        word, suffix = received[0]
        # SCPI-1999 vol 1 6.2.1 (from memory): only the exact short or long form is accepted.
        if word in (node.short, node.long):
            state = node.suffix_state(suffix)
            if state:
                best = max(best, min(state, match_header(rest, received[1:])))
    return best


def parse_received_node(text: str) -> tuple[str, int | None]:
    match = _RECEIVED_NODE.fullmatch(text)
    if match is None:
        raise scpi_error(SYNTAX_ERROR, f"bad header node {text!r}")
    digits = match.group(2)
    return match.group(1).upper(), (int(digits) if digits else None)
