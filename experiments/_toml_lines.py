"""Line numbers in TOML text, so that a spec error can name the line it comes from.

:mod:`tomllib` parses but keeps no positions; this small scanner walks text that already parsed
and records where each table header, key and array element starts.
"""

from __future__ import annotations

import re
import tomllib
from bisect import bisect_right
from collections.abc import Sequence

#: A bare TOML key part.
BARE_KEY = re.compile(r"[A-Za-z0-9_-]+")


class _Locator:
    """Line numbers of the tables, keys and array elements of a TOML text.

    ``lines[path]`` is the line where the table header, key or array element ``path`` (a tuple of
    keys and list indices, as in the parsed document) starts. The text must already have parsed
    with :mod:`tomllib`; this scanner only records positions.
    """

    def __init__(self, text: str) -> None:
        self.s = text
        self.i = 0
        self.newlines = [m.start() for m in re.finditer("\n", text)]
        self.lines: dict[tuple, int] = {}
        self.aot: dict[tuple, int] = {}
        try:
            self._document()
        except (IndexError, ValueError, tomllib.TOMLDecodeError):  # pragma: no cover - best effort
            pass

    def line_of(self, pos: int) -> int:
        return bisect_right(self.newlines, pos - 1) + 1

    def find(self, path: Sequence) -> int | None:
        """Line of the longest prefix of ``path`` found in the text (None if no prefix is)."""
        path = tuple(path)
        for k in range(len(path), 0, -1):
            if path[:k] in self.lines:
                return self.lines[path[:k]]
        return None

    def _record(self, path: tuple, pos: int) -> None:
        self.lines.setdefault(path, self.line_of(pos))

    # -- lexical pieces ------------------------------------------------------------------------
    def _peek(self, n: int = 1) -> str:
        return self.s[self.i : self.i + n]

    def _skip(self, newlines: bool = True) -> None:
        s = self.s
        while self.i < len(s):
            c = s[self.i]
            if c in " \t\r" or (newlines and c == "\n"):
                self.i += 1
            elif c == "#":
                while self.i < len(s) and s[self.i] != "\n":
                    self.i += 1
            else:
                break

    def _string(self) -> str:
        s, start = self.s, self.i
        for quote in ('"""', "'''"):
            if s.startswith(quote, self.i):
                self.i += 3
                while not s.startswith(quote, self.i):
                    if self.i >= len(s):  # never closed (a key typed on the command line)
                        raise ValueError("unterminated string")
                    self.i += 2 if (quote == '"""' and s[self.i] == "\\") else 1
                self.i += 3
                extra = 0
                while extra < 2 and self.i < len(s) and s[self.i] == quote[0]:
                    self.i += 1  # up to two quotes may end the content
                    extra += 1
                return ""
        quote = s[self.i]
        self.i += 1
        while self.i < len(s) and s[self.i] != quote:
            self.i += 2 if (quote == '"' and s[self.i] == "\\") else 1
        if self.i >= len(s):
            raise ValueError("unterminated string")
        self.i += 1
        raw = s[start : self.i]
        return tomllib.loads(f"k = {raw}")["k"]

    def _key(self) -> tuple:
        parts = []
        while True:
            self._skip(newlines=False)
            if self._peek() in ('"', "'"):
                parts.append(self._string())
            else:
                m = BARE_KEY.match(self.s, self.i)
                if m is None:
                    raise ValueError("bad key")
                parts.append(m.group())
                self.i = m.end()
            self._skip(newlines=False)
            if self._peek() == ".":
                self.i += 1
                continue
            return tuple(parts)

    def _resolve(self, key: tuple) -> tuple:
        """Header key -> document path, inserting the current index of arrays of tables."""
        out: tuple = ()
        for k in range(len(key)):
            out = (*out, key[k])
            if key[: k + 1] in self.aot and k < len(key) - 1:
                out = (*out, self.aot[key[: k + 1]])
        return out

    # -- grammar -------------------------------------------------------------------------------
    def _document(self) -> None:
        table: tuple = ()
        while True:
            self._skip()
            if self.i >= len(self.s):
                return
            start = self.i
            if self._peek(2) == "[[":
                self.i += 2
                key = self._key()
                self.i += 2
                idx = self.aot.get(key, -1) + 1
                self.aot[key] = idx
                # deeper arrays of tables restart when their parent element changes
                for k in [k for k in self.aot if len(k) > len(key) and k[: len(key)] == key]:
                    del self.aot[k]
                table = (*self._resolve(key), idx)
                self._record(table, start)
            elif self._peek() == "[":
                self.i += 1
                key = self._key()
                self.i += 1
                table = self._resolve(key)
                self._record(table, start)
            else:
                key = self._key()
                self._skip(newlines=False)
                self.i += 1  # "="
                path = (*table, *key)
                self._record(path, start)
                self._skip(newlines=False)
                self._value(path)

    def _value(self, path: tuple) -> None:
        s = self.s
        c = s[self.i]
        if c in ('"', "'"):
            self._string()
        elif c == "[":
            self.i += 1
            idx = 0
            while True:
                self._skip()
                if s[self.i] == "]":
                    self.i += 1
                    return
                self._record((*path, idx), self.i)
                self._value((*path, idx))
                self._skip()
                if s[self.i] == ",":
                    self.i += 1
                    idx += 1
        elif c == "{":
            self.i += 1
            while True:
                self._skip()
                if s[self.i] == "}":
                    self.i += 1
                    return
                start = self.i
                key = self._key()
                self._skip()
                self.i += 1  # "="
                self._record((*path, *key), start)
                self._skip()
                self._value((*path, *key))
                self._skip()
                if s[self.i] == ",":
                    self.i += 1
        else:
            m = re.compile(r"[^,\]}\n#]*").match(s, self.i)
            self.i = m.end()


def _parse_key(text: str) -> tuple:
    """A dotted TOML key (bare or quoted parts) as a tuple; ValueError if it is not one."""
    loc = _Locator("")
    loc.s, loc.i = text, 0
    path = loc._key()
    if loc.i != len(text) or not path:
        raise ValueError(f"not a dotted key: {text!r}")
    return path
