"""Safe YAML reading with positions, and the field checker protocol and rig files share.

``load(path)`` reads a file into a tree of ``Node`` values that keep the line and column of
every mapping, sequence and scalar, so every problem can be printed as
``file:line:col: what is wrong (hint)``. The loader

* composes only (``yaml.SafeLoader`` machinery; nothing is ever constructed into objects);
* refuses files above ``MAX_BYTES``, nesting deeper than ``MAX_DEPTH``, more than
  ``MAX_ALIASES`` alias uses or a tree that expands to more than ``MAX_NODES`` nodes; an
  alias that refers to itself (``&a [*a]``) is an error, never a hang;
* makes a duplicate key an error (the default loader silently keeps the last one) and
  refuses merge keys (``<<``) and explicit application tags;
* keeps every scalar as its raw text together with the type YAML 1.1 would give it
  (``tag``), so a schema can refuse the YAML 1.1 surprises: ``on``/``off``/``yes``/``no``/
  ``y``/``n`` (any case) read as booleans, ``1:30`` read as 90, ``0755`` read as octal.

``Fields`` is the checker: it walks a ``Node`` tree with a schema written in code, collects
every problem in one pass and hands them over as one ``ProtocolError``.
"""
from __future__ import annotations

import difflib
import re
from dataclasses import dataclass
from typing import Any, Dict, Iterable, List, Optional, Sequence, Tuple

import yaml

from drivers.yamllimits import MAX_ALIASES, MAX_BYTES, MAX_DEPTH, LimitedLoader, YamlLimit

from .errors import Problem, ProtocolError
from .quantities import QuantityError, parse_quantity

MAX_NODES = 100_000

_YAML = "tag:yaml.org,2002:"
_KNOWN_TAGS = {"str", "int", "float", "bool", "null", "timestamp", "map", "seq"}
_BOOL_WORDS_11 = {"y", "n", "yes", "no", "on", "off", "true", "false"}


@dataclass(eq=False)
class Node:
    """One YAML node with its position (1-based line and column).

    ``kind`` is "map", "seq" or "scalar". For a map, ``value`` is a list of (key Node,
    value Node) pairs in file order; for a seq a list of Nodes; for a scalar the raw text.
    ``tag`` is what YAML 1.1 makes of a plain scalar ("str", "int", "float", "bool",
    "null", "timestamp"); quoted scalars are always "str". ``quoted`` says it was quoted.
    """
    kind: str
    value: Any
    line: int
    col: int
    tag: str = "str"
    quoted: bool = False

    # -- mapping helpers ---------------------------------------------------------------
    def items(self) -> List[Tuple["Node", "Node"]]:
        return self.value if self.kind == "map" else []

    def get(self, key: str) -> Optional["Node"]:
        for k, v in self.items():
            if k.kind == "scalar" and k.value == key:
                return v
        return None

    def keys(self) -> List[str]:
        return [k.value for k, _ in self.items() if k.kind == "scalar"]

    @property
    def is_null(self) -> bool:
        return self.kind == "scalar" and self.tag == "null"


def _where(mark) -> Tuple[int, int]:
    if mark is None:
        return 1, 1
    return mark.line + 1, mark.column + 1


_LimitedLoader = LimitedLoader      # shared with every other YAML read (drivers.yamllimits)
_Limit = YamlLimit


def _short_tag(tag: str) -> str:
    return tag[len(_YAML):] if tag and tag.startswith(_YAML) else tag


class _Converter:
    """yaml nodes -> Node, expanding aliases with cycle and size checks."""

    def __init__(self, file: str):
        self.file = file
        self.count = 0
        self.problems: List[Problem] = []

    def problem(self, ynode, message, hint=""):
        line, col = _where(ynode.start_mark)
        self.problems.append(Problem(self.file, line, col, message, hint))

    def convert(self, ynode, path: tuple) -> Node:
        self.count += 1
        if self.count > MAX_NODES:
            raise _Limit(f"the document expands to more than {MAX_NODES} nodes "
                         "(aliases?)", ynode.start_mark)
        line, col = _where(ynode.start_mark)
        tag = _short_tag(ynode.tag)
        if id(ynode) in path:
            raise _Limit("an alias refers to a node that contains it (a cycle)",
                         ynode.start_mark)
        if isinstance(ynode, yaml.ScalarNode):
            if tag == "merge":          # the key '<<' (refused by the mapping below)
                tag = "str"
            if tag not in _KNOWN_TAGS:
                self.problem(ynode, f"tag {ynode.tag!r} is not allowed",
                             "plain YAML only: remove the tag")
                tag = "str"
            quoted = ynode.style in ("'", '"')
            return Node("scalar", ynode.value, line, col, "str" if quoted else tag, quoted)
        inner = path + (id(ynode),)
        if isinstance(ynode, yaml.SequenceNode):
            if tag != "seq":
                self.problem(ynode, f"tag {ynode.tag!r} is not allowed", "remove the tag")
            return Node("seq", [self.convert(c, inner) for c in ynode.value], line, col, "seq")
        if tag != "map":
            self.problem(ynode, f"tag {ynode.tag!r} is not allowed", "remove the tag")
        pairs = []
        seen: Dict[str, int] = {}
        for k, v in ynode.value:
            key = self.convert(k, inner)
            if key.kind != "scalar":
                self.problem(k, "a key must be a plain word", "")
                continue
            if key.value == "<<" and not key.quoted:
                self.problem(k, "merge keys ('<<') are not supported",
                             "write the keys out in full")
                continue
            if key.value in seen:
                self.problem(k, f"duplicate key {key.value!r} (first at line "
                                f"{seen[key.value]})",
                             "YAML would silently keep only the last one; remove one")
                continue
            seen[key.value] = key.line
            pairs.append((key, self.convert(v, inner)))
        return Node("map", pairs, line, col, "map")


def load_text(text: str, file: str = "<text>") -> Node:
    """Compose ``text`` into a Node tree; raise ``ProtocolError`` on any problem."""
    if len(text) > MAX_BYTES:
        raise ProtocolError(Problem(file, 1, 1, f"file is larger than {MAX_BYTES} bytes",
                                    "a protocol or rig file is a few kilobytes"))
    if not text.strip() or all(not ln.strip() or ln.lstrip().startswith("#")
                               for ln in text.splitlines()):
        raise ProtocolError(Problem(file, 1, 1, "file is empty",
                                    "a protocol needs 'steps'; a rig file 'instruments'"))
    loader = None
    try:
        loader = _LimitedLoader(text)
        ynode = loader.get_single_node()
    except _Limit as exc:
        line, col = _where(exc.mark)
        raise ProtocolError(Problem(file, line, col, exc.message,
                                    "keep the file flat and free of alias tricks")) from None
    except yaml.MarkedYAMLError as exc:
        line, col = _where(exc.problem_mark or exc.context_mark)
        what = (exc.problem or "YAML syntax error").strip()
        ctx = (exc.context or "").strip()
        raise ProtocolError(Problem(file, line, col, f"YAML syntax error: {what}",
                                    ctx)) from None
    except yaml.YAMLError as exc:  # ReaderError: unprintable characters
        pos = getattr(exc, "position", 0) or 0
        line = text.count("\n", 0, pos) + 1
        col = pos - (text.rfind("\n", 0, pos) + 1) + 1
        raise ProtocolError(Problem(file, line, col, "unreadable character in file",
                                    str(getattr(exc, "reason", "")) or "")) from None
    except RecursionError:
        raise ProtocolError(Problem(file, 1, 1, "nesting too deep", "")) from None
    finally:
        if loader is not None:
            loader.dispose()
    if ynode is None:
        raise ProtocolError(Problem(file, 1, 1, "file is empty", ""))
    conv = _Converter(file)
    try:
        node = conv.convert(ynode, ())
    except _Limit as exc:
        line, col = _where(exc.mark)
        raise ProtocolError(conv.problems + [Problem(file, line, col, exc.message,
                                                     "do not nest aliases")]) from None
    except RecursionError:
        raise ProtocolError(Problem(file, 1, 1, "nesting too deep", "")) from None
    if conv.problems:
        raise ProtocolError(conv.problems)
    return node


def load(path) -> Tuple[Node, str]:
    """Read and compose the file at ``path``. Returns (root Node, text)."""
    name = str(path)
    try:
        with open(path, "rb") as fh:
            data = fh.read(MAX_BYTES + 1)
    except OSError as exc:
        raise ProtocolError(Problem(name, 1, 1, f"cannot read file: {exc.strerror or exc}",
                                    "")) from None
    if len(data) > MAX_BYTES:
        raise ProtocolError(Problem(name, 1, 1, f"file is larger than {MAX_BYTES} bytes",
                                    "a protocol or rig file is a few kilobytes"))
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = data.count(b"\n", 0, exc.start) + 1
        raise ProtocolError(Problem(name, line, 1, "file is not UTF-8 text", "")) from None
    return load_text(text, name), text


# ---------------------------------------------------------------------------------------
# The field checker
# ---------------------------------------------------------------------------------------

_INT_RE = re.compile(r"^[+-]?(0|[1-9][0-9_]*)$")
_EXP_FLOAT_RE = re.compile(r"^[-+]?(?:\d+\.?\d*|\.\d+)[eE][-+]?\d+$")
_OCTAL_RE = re.compile(r"^[+-]?0[0-9_]+$|^[+-]?0o[0-7]+$")


def did_you_mean(word: str, options: Iterable[str]) -> str:
    close = difflib.get_close_matches(str(word), list(options), n=1, cutoff=0.6)
    return f"did you mean {close[0]!r}?" if close else ""


def _yaml11_surprise(node: Node) -> Optional[str]:
    """A message when a plain scalar would not be the text it looks like under YAML 1.1."""
    if node.kind != "scalar" or node.quoted:
        return None
    text = node.value
    if node.tag == "str" and text.lower() in ("y", "n"):
        # YAML 1.1 lists y and n as booleans (yaml.org/type/bool.html); PyYAML does not,
        # other readers of the same file do
        return f"{text!r} is read as a boolean ({text.lower() == 'y'}) by YAML 1.1"
    if node.tag == "bool":
        return (f"{text!r} is read as a boolean ({text.lower() in ('y', 'yes', 'on', 'true')})"
                " by YAML 1.1")
    if node.tag == "int" and ":" in text:
        return f"{text!r} is read by YAML 1.1 as a base-60 number"
    if node.tag == "int" and _OCTAL_RE.match(text):
        return f"{text!r} is read by YAML 1.1 as an octal number"
    if node.tag == "int" and (text.lower().startswith(("0x", "+0x", "-0x", "0b", "+0b", "-0b"))
                              or "_" in text):
        return f"{text!r} is read by YAML 1.1 as a number in another notation"
    if node.tag == "float" and ":" in text:
        return f"{text!r} is read by YAML 1.1 as a base-60 number"
    if node.tag == "timestamp":
        return f"{text!r} is read by YAML 1.1 as a date"
    return None


class Fields:
    """Collects problems while a schema in code reads a Node tree.

    Every reader method returns the value, or None after recording a problem (or when the
    node is absent and optional). Call ``raise_if_any()`` at the end.
    """

    def __init__(self, file: str):
        self.file = file
        self.problems: List[Problem] = []

    # -- bookkeeping -----------------------------------------------------------------
    def add(self, node: Optional[Node], message: str, hint: str = "", line: int = 0) -> None:
        ln = node.line if node is not None else (line or 1)
        col = node.col if node is not None else 1
        self.problems.append(Problem(self.file, ln, col, message, hint))

    def raise_if_any(self) -> None:
        if self.problems:
            raise ProtocolError(sorted(self.problems, key=lambda p: (p.line, p.col)))

    def refuse_other_kind(self, root: Optional[Node], has: str, lacks: str,
                          message: str, hint: str) -> None:
        """One problem, raised at once, when ``root`` is the other kind of file (it has
        key ``has`` and not ``lacks``: a protocol and a rig file swapped on the command
        line), instead of a dozen unknown-key lines."""
        if root is not None and root.kind == "map" and root.get(has) is not None \
                and root.get(lacks) is None:
            self.add(root, message, hint)
            self.raise_if_any()

    # -- structure ---------------------------------------------------------------------
    def mapping(self, node: Optional[Node], what: str, allowed: Sequence[str],
                required: Sequence[str] = ()) -> Optional[Dict[str, Node]]:
        """Check ``node`` is a mapping with known keys only; return key -> value Node."""
        if node is None:
            return None
        if node.kind != "map":
            self.add(node, f"{what} must be a mapping of keys to values",
                     f"got {self._describe(node)}")
            return None
        out: Dict[str, Node] = {}
        for k, v in node.items():
            if k.value not in allowed:
                hint = did_you_mean(k.value, allowed) or ("known keys: " + ", ".join(allowed))
                self.add(k, f"unknown key {k.value!r} in {what}", hint)
                continue
            out[k.value] = v
        for r in required:
            if r not in out:
                self.add(node, f"{what} needs {r!r}", "")
        return out

    def sequence(self, node: Optional[Node], what: str, nonempty: bool = False
                 ) -> Optional[List[Node]]:
        if node is None:
            return None
        if node.kind != "seq":
            self.add(node, f"{what} must be a list", f"got {self._describe(node)}")
            return None
        if nonempty and not node.value:
            self.add(node, f"{what} is empty", "")
            return None
        return list(node.value)

    @staticmethod
    def _describe(node: Node) -> str:
        if node.kind == "map":
            return "a mapping"
        if node.kind == "seq":
            return "a list"
        if node.is_null:
            return "nothing"
        return f"{node.value!r}"

    def _scalar(self, node: Node, what: str) -> bool:
        if node.kind != "scalar":
            self.add(node, f"{what} must be a single value", f"got {self._describe(node)}")
            return False
        if node.is_null:
            self.add(node, f"{what} has no value", "")
            return False
        return True

    # -- scalars -----------------------------------------------------------------------
    def text(self, node: Optional[Node], what: str, *, pattern: Optional[str] = None,
             hint: str = "", allow_empty: bool = False, max_len: int = 4000) -> Optional[str]:
        if node is None:
            return None
        if node.kind == "scalar" and node.is_null and allow_empty:
            return ""
        if not self._scalar(node, what):
            return None
        surprise = _yaml11_surprise(node)
        if surprise:
            self.add(node, f"{what}: {surprise}", "quote it if you mean the text")
            return None
        if node.tag == "float" and not node.quoted:
            self.add(node, f"{what}: {node.value!r} is read by YAML as a number",
                     "quote it if you mean the text")
            return None
        s = node.value
        if len(s) > max_len:
            self.add(node, f"{what} is longer than {max_len} characters", "")
            return None
        if pattern and not re.fullmatch(pattern, s):
            self.add(node, f"{what} {s!r} is not valid", hint)
            return None
        return s

    def choice(self, node: Optional[Node], what: str, options: Sequence[str]) -> Optional[str]:
        if node is None:
            return None
        if not self._scalar(node, what):
            return None
        surprise = _yaml11_surprise(node)
        if surprise:
            self.add(node, f"{what}: {surprise}",
                     "write one of: " + ", ".join(options))
            return None
        if node.value not in options:
            self.add(node, f"{what} {node.value!r} is not one of: {', '.join(options)}",
                     did_you_mean(node.value, options))
            return None
        return node.value

    def integer(self, node: Optional[Node], what: str, lo: int = None, hi: int = None
                ) -> Optional[int]:
        if node is None:
            return None
        if not self._scalar(node, what):
            return None
        surprise = _yaml11_surprise(node)
        if surprise:
            self.add(node, f"{what}: {surprise}", "write a plain decimal whole number")
            return None
        if not _INT_RE.match(node.value) or "_" in node.value:
            self.add(node, f"{what} must be a whole number, got {node.value!r}", "")
            return None
        v = int(node.value)
        if (lo is not None and v < lo) or (hi is not None and v > hi):
            rng = f"{lo}..{hi}" if hi is not None else f">= {lo}"
            self.add(node, f"{what} {v} is out of range ({rng})", "")
            return None
        return v

    def boolean(self, node: Optional[Node], what: str) -> Optional[bool]:
        if node is None:
            return None
        if not self._scalar(node, what):
            return None
        if not node.quoted and node.value in ("true", "false"):
            return node.value == "true"
        self.add(node, f"{what} must be true or false, got {node.value!r}",
                 "only the words true and false (yes/no/on/off are YAML 1.1 traps)")
        return None

    def quantity(self, node: Optional[Node], what: str, unit: str, *,
                 alternatives: tuple = (), positive: bool = False, nonnegative: bool = True,
                 at_most: Optional[float] = None, at_least: Optional[float] = None):
        """A number with a unit, in SI. With ``alternatives`` the result is a
        ``quantities.Quantity`` (so the caller sees which unit matched); else a float."""
        if node is None:
            return None
        if not self._scalar(node, what):
            return None
        if node.tag == "bool" and not node.quoted:
            self.add(node, f"{what}: {_yaml11_surprise(node)}, not a quantity",
                     "write a number with a unit, e.g. \"10 s\"")
            return None
        try:
            q = parse_quantity(node.value, unit, alternatives=alternatives)
        except QuantityError as exc:
            self.add(node, f"{what}: {exc.message}", exc.hint)
            return None
        if positive and not q.value > 0:
            self.add(node, f"{what} must be above zero, got {q.text!r}", "")
            return None
        if nonnegative and q.value < 0:
            self.add(node, f"{what} must not be negative, got {q.text!r}",
                     "voltages and currents are magnitudes; the rig file's polarity "
                     "sets the sign" if unit in ("V", "A") else "")
            return None
        if q.unit == unit:
            if at_most is not None and q.value > at_most:
                self.add(node, f"{what} {q.text!r} is above the allowed {at_most:g} {unit}", "")
                return None
            if at_least is not None and q.value < at_least:
                self.add(node, f"{what} {q.text!r} is below the allowed {at_least:g} {unit}", "")
                return None
        return q if alternatives else q.value

    def argv(self, node: Optional[Node], what: str) -> Optional[Tuple[str, ...]]:
        """A command as a list of argument strings (never a shell line)."""
        if node is None:
            return None
        if node.kind != "seq":
            self.add(node, f"{what} must be a list of arguments, e.g. "
                           "[\"notify-send\", \"fieldrun\", \"trip\"]",
                     "commands are run without a shell, so give each argument separately")
            return None
        if not node.value:
            self.add(node, f"{what} is an empty command", "")
            return None
        out = []
        for item in node.value:
            if item.kind != "scalar" or item.is_null:
                self.add(item, f"{what}: each argument must be a single value", "")
                return None
            surprise = _yaml11_surprise(item)
            if surprise:
                self.add(item, f"{what}: {surprise}", "quote it if you mean the text")
                return None
            out.append(item.value)
        return tuple(out)

    def plain(self, node: Node, what: str) -> Any:
        """A pass-through value (options, simulation settings) as plain Python: mappings,
        lists, str, int, float, bool (true/false only), None. YAML 1.1 surprises are
        refused here too."""
        if node.kind == "map":
            return {k.value: self.plain(v, f"{what}.{k.value}") for k, v in node.items()}
        if node.kind == "seq":
            return [self.plain(v, what) for v in node.value]
        if node.quoted:
            return node.value
        if node.tag == "str":
            # PyYAML (YAML 1.1) reads 1e6 as text; anyone writing it means a number
            if _EXP_FLOAT_RE.match(node.value):
                return float(node.value)
            return node.value
        if node.tag == "null":
            return None
        if node.tag == "bool":
            if node.value in ("true", "false"):
                return node.value == "true"
            self.add(node, f"{what}: {_yaml11_surprise(node)}",
                     "write true or false, or quote it if you mean the text")
            return None
        surprise = _yaml11_surprise(node)
        if surprise:
            self.add(node, f"{what}: {surprise}", "quote it if you mean the text")
            return None
        if node.tag == "int":
            return int(node.value)
        if node.tag == "float":
            try:
                v = float(node.value.replace("_", ""))
            except ValueError:
                self.add(node, f"{what}: {node.value!r} is not a number", "")
                return None
            if v != v or v in (float("inf"), float("-inf")):
                self.add(node, f"{what}: {node.value!r} is not a finite number", "")
                return None
            return v
        return node.value
