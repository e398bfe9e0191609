"""Reading YAML safely, keeping the line of every key.

:func:`read_yaml` returns plain data (dict, list, str, int, float, bool, None) and a
:class:`Lines` map from key paths to 1-based line numbers, so that later checks can
name the line of a bad value. Only the YAML core types are accepted: any other tag
(``!!python/object``, ``!!binary``, custom tags) is an error, and so is an alias
expansion that grows past :data:`MAX_NODES` values (an "alias bomb"), a nesting
deeper than :data:`MAX_DEPTH` levels and an anchor that contains itself.

A document is scanned and parsed by libyaml where PyYAML has it (about 7x faster
on a problem file), under PyYAML's own composer, resolver and safe constructor, so
the data and lines are those of the pure-Python loader; a document libyaml cannot
read, or with a character the pure-Python reader refuses, is read again by the
pure-Python loader, whose message names the fault. libyaml accepts a few documents
the pure-Python loader refuses, as YAML allows them (a tab as the space before a
comment or a value, a '?' inside a plain value in brackets); such a document is read,
and its values are then checked like any other.

:func:`read_text` looks at a file before reading it: only a regular file of at most
:data:`MAX_BYTES` bytes is read (a device such as /dev/zero, a FIFO or a socket is
refused without being opened), and never more than that many bytes.
"""

from __future__ import annotations

import os
import stat
from pathlib import Path

import yaml
from yaml.composer import Composer
from yaml.constructor import SafeConstructor
from yaml.resolver import Resolver

from ..errors import InputError

try:  # libyaml's scanner and parser, where PyYAML was built with it
    from yaml._yaml import CParser
except ImportError:  # pragma: no cover - PyYAML without libyaml: the pure-Python loader does all
    CParser = None

MAX_BYTES = 2_000_000
MAX_NODES = 50_000  # values built from aliases (a plain document is bounded by MAX_BYTES)
MAX_DEPTH = 64  # nesting levels, counting those reached through aliases

_PLAIN_TAGS = {
    "tag:yaml.org,2002:str",
    "tag:yaml.org,2002:int",
    "tag:yaml.org,2002:float",
    "tag:yaml.org,2002:bool",
    "tag:yaml.org,2002:null",
}
_MAP = "tag:yaml.org,2002:map"
_SEQ = "tag:yaml.org,2002:seq"


class Lines:
    """Key path (tuple of str/int) -> 1-based line of that key or item."""

    def __init__(self):
        self._lines: dict[tuple, int] = {}

    def set(self, path: tuple, line: int) -> None:
        self._lines.setdefault(path, line)

    def own(self, path) -> int | None:
        """Line of ``path`` itself; None if it has none (no ancestor's line)."""
        return self._lines.get(tuple(path))

    def get(self, path) -> int | None:
        """Line of ``path``, or of its nearest ancestor that has one."""
        path = tuple(path)
        while path:
            if path in self._lines:
                return self._lines[path]
            path = path[:-1]
        return self._lines.get(())


def read_text(path) -> str:
    """Read a small UTF-8 text file, or raise InputError naming it.

    The file is looked at first (kind and size), so a device, a FIFO or a huge file
    is refused without reading it; at most MAX_BYTES + 1 bytes are ever read."""
    if str(path) == "":
        raise InputError.one(path, None, "", "no file name given")
    p = Path(path)
    try:
        info = os.stat(p)
    except FileNotFoundError:
        raise InputError.one(path, None, "", "file not found") from None
    except NotADirectoryError:
        raise InputError.one(path, None, "", "file not found (a part of the path is a file, not a folder)") from None
    except OSError as exc:
        raise InputError.one(path, None, "", f"cannot be read ({exc.strerror})") from None
    if stat.S_ISDIR(info.st_mode):
        raise InputError.one(path, None, "", "is a folder, expected a file")
    if not stat.S_ISREG(info.st_mode):
        what = ("a FIFO (named pipe)" if stat.S_ISFIFO(info.st_mode) else
                "a device" if stat.S_ISCHR(info.st_mode) or stat.S_ISBLK(info.st_mode) else
                "a socket" if stat.S_ISSOCK(info.st_mode) else "not a regular file")
        raise InputError.one(path, None, "", f"is {what}, expected a regular file")
    if info.st_size > MAX_BYTES:
        raise InputError.one(path, None, "", f"file is larger than {MAX_BYTES} bytes")
    try:
        with open(p, "rb") as fh:
            raw = fh.read(MAX_BYTES + 1)
    except OSError as exc:
        raise InputError.one(path, None, "", f"cannot be read ({exc.strerror})") from None
    if len(raw) > MAX_BYTES:
        raise InputError.one(path, None, "", f"file is larger than {MAX_BYTES} bytes")
    if b"\x00" in raw:
        raise InputError.one(path, None, "", "is a binary file, expected UTF-8 text")
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        line = raw[: exc.start].count(b"\n") + 1
        raise InputError.one(path, line, "", "is not UTF-8 text (binary file?)") from None
    if not text.strip():
        raise InputError.one(path, None, "", "file is empty")
    return text


def key_text(path) -> str:
    """Dotted text of a key path: ('feeds', 'glucose', 'rows', 2) -> feeds.glucose.rows[2]."""
    out = ""
    for part in path:
        if isinstance(part, int):
            out += f"[{part}]"
        else:
            out += ("." if out else "") + str(part)
    return out


def read_yaml(path, text: str | None = None):
    """Parse a YAML file into plain data and a :class:`Lines` map.

    Raises
    ------
    InputError
        Naming the file and line for a syntax error, a disallowed tag, a duplicate
        key, a non-string key, or an alias bomb; also for an empty or binary file.
    """
    if text is None:
        text = read_text(path)
    fast = _fast_read(path, text)
    if fast is not None:
        return fast
    try:
        loader = _Loader(text)  # checks every character first
    except yaml.reader.ReaderError as exc:
        line = text[: exc.position].count("\n") + 1 if isinstance(exc.position, int) else None
        raise InputError.one(path, line, "", f"character {chr(exc.character)!r} (code {exc.character:#04x}) "
                                             "is not allowed in a YAML file") from None
    try:
        try:
            node = _single_node(loader, path)
        except InputError:
            raise
        except ValueError as exc:  # e.g. an escape past the last code point ("\U00110000")
            raise InputError.one(path, None, "", f"YAML syntax error: {exc}") from None
        except yaml.MarkedYAMLError as exc:
            mark = exc.problem_mark or exc.context_mark
            line = mark.line + 1 if mark else None
            what = exc.problem or "syntax error"
            ctx = exc.context_mark
            if exc.context and "flow" in exc.context and ctx is not None and line != ctx.line + 1:
                # an unclosed [ or { : the fault is where it opens, not where parsing gave up
                bracket = "{" if "mapping" in exc.context else "["
                what = f"the '{bracket}' opened here is not closed ({what} on line {line})"
                line = ctx.line + 1
            raise InputError.one(path, line, "", f"YAML syntax error: {what}") from None
        except yaml.YAMLError as exc:
            raise InputError.one(path, None, "", f"YAML syntax error: {exc}") from None
        if node is None:
            raise InputError.one(path, None, "", "file holds no YAML document")
        lines = Lines()
        data = _build(node, (), path, lines, loader, _Seen())
        return data, lines
    finally:
        loader.dispose()


def _fast_read(path, text):
    """(data, lines) of a document that libyaml reads without complaint, with the
    same node tree as the pure-Python loader (libyaml scans and parses, PyYAML's own
    composer, with its nesting bound, resolves and builds): about 7x faster on a
    problem file. None where libyaml is missing, where a character is one the
    pure-Python reader refuses (or a byte order mark past the first character, which
    libyaml skips and the pure-Python reader keeps), where a node carries the bare
    tag '!' (the two read it differently), or where libyaml finds the document
    broken: :func:`read_yaml` then reads the text again with the pure-Python loader,
    whose messages name the fault. A fault found in the node tree, which is the
    same either way (a tag, a duplicate key, too deep, an alias bomb), is raised
    here as the pure-Python path raises it, without reading the text twice."""
    if CParser is None or yaml.reader.Reader.NON_PRINTABLE.search(text) or "\ufeff" in text[1:]:
        return None
    try:
        loader = _FastLoader(text)
    except Exception:  # noqa: BLE001 - the pure-Python loader says what is wrong
        return None
    try:
        try:
            node = _single_node(loader, path)
        except InputError:
            raise
        except Exception:  # noqa: BLE001 - libyaml's complaint: the pure-Python loader says what is wrong
            return None
        if node is None:
            return None
        lines = Lines()
        return _build(node, (), path, lines, loader, _Seen()), lines
    finally:
        loader.dispose()


def _single_node(loader, path):
    """The document's root node; InputError naming the line where it nests too deep."""
    try:
        return loader.get_single_node()
    except _TooDeep as exc:
        raise InputError.one(path, exc.line, "", f"YAML nested more than {MAX_DEPTH} levels deep") from None


class _Declined(Exception):
    """The fast path leaves this document to the pure-Python loader."""


class _TooDeep(Exception):
    def __init__(self, line):
        self.line = line


class _DepthBound:
    """PyYAML's composer with the nesting bounded: it recurses once per level, so 5000
    nested brackets would otherwise end in a RecursionError."""

    _depth = 0

    def compose_node(self, parent, index):
        self._depth += 1
        try:
            if self._depth > MAX_DEPTH:
                raise _TooDeep(self.peek_event().start_mark.line + 1)
            return super().compose_node(parent, index)
        finally:
            self._depth -= 1


class _Loader(_DepthBound, yaml.SafeLoader):
    """PyYAML's safe loader, pure Python, with the nesting bounded."""


if CParser is not None:
    class _FastLoader(_DepthBound, Composer, CParser, SafeConstructor, Resolver):
        """libyaml's scanner and parser under PyYAML's composer (its nesting bounded
        as in :class:`_Loader`), safe constructor and resolver."""

        def __init__(self, text):
            CParser.__init__(self, text)
            Composer.__init__(self)
            SafeConstructor.__init__(self)
            Resolver.__init__(self)

        def compose_node(self, parent, index):
            if getattr(self.peek_event(), "tag", None) == "!":
                raise _Declined
            return super().compose_node(parent, index)


class _Seen:
    """Nodes already built once, and how many values were built again through aliases."""

    def __init__(self):
        self.ids = set()
        self.again = 0


def _build(node, keypath, file, lines, loader, seen):
    # name the key whose value blows up, not the depths of the expansion
    named = keypath[: next((i for i, k in enumerate(keypath) if isinstance(k, int)), len(keypath))]
    if id(node) in seen.ids:  # reached again through an alias
        seen.again += 1
        if seen.again > MAX_NODES:
            raise InputError.one(
                file, lines.get(named), key_text(named),
                f"document expands to more than {MAX_NODES} values (alias bomb?)",
            )
    seen.ids.add(id(node))
    if len(keypath) > MAX_DEPTH:  # an anchor that holds itself, or aliases stacked deep
        raise InputError.one(file, lines.get(named), key_text(named),
                             f"YAML nested more than {MAX_DEPTH} levels deep (an anchor that contains itself?)")
    lines.set(keypath, node.start_mark.line + 1)
    if isinstance(node, yaml.MappingNode):
        if node.tag != _MAP:
            raise _bad_tag(node, keypath, file)
        out = {}
        for knode, vnode in node.value:
            if knode.tag == "tag:yaml.org,2002:merge":
                raise InputError.one(file, knode.start_mark.line + 1, key_text(keypath),
                                     "merge keys ('<<') are not supported")
            if not isinstance(knode, yaml.ScalarNode) or knode.tag not in _PLAIN_TAGS:
                raise InputError.one(file, knode.start_mark.line + 1, key_text(keypath),
                                     "keys must be plain names")
            key = str(knode.value)
            if key in out:
                raise InputError.one(file, knode.start_mark.line + 1, key_text(keypath + (key,)),
                                     "duplicate key")
            lines.set(keypath + (key,), knode.start_mark.line + 1)
            out[key] = _build(vnode, keypath + (key,), file, lines, loader, seen)
        return out
    if isinstance(node, yaml.SequenceNode):
        if node.tag != _SEQ:
            raise _bad_tag(node, keypath, file)
        return [
            _build(item, keypath + (i,), file, lines, loader, seen)
            for i, item in enumerate(node.value)
        ]
    if node.tag not in _PLAIN_TAGS:
        raise _bad_tag(node, keypath, file)
    return loader.construct_object(node, deep=True)


def _bad_tag(node, keypath, file):
    return InputError.one(
        file, node.start_mark.line + 1, key_text(keypath),
        f"YAML tag {node.tag!r} is not allowed; use plain values",
    )
