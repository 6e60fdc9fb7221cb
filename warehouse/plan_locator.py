"""Where each key and value of a TOML file sits: ``(line, column)`` for a key path.

``tomllib`` parses but keeps no positions, so this small scanner walks the source text once and records, for
every key path it meets, the position of the key and of its value. It understands what monitoring plans use:
``[table]`` and ``[[array.of.tables]]`` headers, dotted keys, one-line inline tables, and arrays (also over
several lines) whose string elements get positions of their own. Anything it does not understand simply has
no position, and callers fall back to the nearest enclosing path.

Paths are tuples such as ``("chart", 2, "select", "layer")`` (the third ``[[chart]]``) or
``("chart", 0, "rules", 1)`` (the second element of that array). Lines and columns are 1-based.
"""

from __future__ import annotations

import re

Path = tuple[str | int, ...]

_HEADER = re.compile(r"^\s*(\[\[?)\s*([^\]]+?)\s*\]\]?\s*(#.*)?$")
_KEY = re.compile(
    r'\s*((?:[A-Za-z0-9_\-]+|"[^"]*"|\'[^\']*\')(?:\s*\.\s*(?:[A-Za-z0-9_\-]+|"[^"]*"|\'[^\']*\'))*)\s*=\s*'
)
_BARE = re.compile(r"[A-Za-z0-9_\-]+")


def _split_key(text: str) -> list[str]:
    parts = []
    for raw in re.findall(r'"[^"]*"|\'[^\']*\'|[A-Za-z0-9_\-]+', text):
        parts.append(raw[1:-1] if raw[0] in "\"'" else raw)
    return parts


def _mask_strings(line: str) -> str:
    """The line with the contents of quoted strings replaced by spaces (same length) and comments cut."""
    out, i, quote = [], 0, None
    while i < len(line):
        ch = line[i]
        if quote:
            if ch == "\\" and quote == '"' and i + 1 < len(line):
                out.append("  ")
                i += 2
                continue
            out.append(ch if ch == quote else " ")
            if ch == quote:
                quote = None
        elif ch in "\"'":
            quote = ch
            out.append(ch)
        elif ch == "#":
            break
        else:
            out.append(ch)
        i += 1
    return "".join(out)


class Locator:
    """Positions of the keys and values of one TOML text."""

    def __init__(self, text: str) -> None:
        self.keys: dict[Path, tuple[int, int]] = {}
        self.values: dict[Path, tuple[int, int]] = {}
        self._scan(text)

    def key(self, path: Path) -> tuple[int, int]:
        """Position of the key at ``path`` (or of the nearest enclosing path that has one)."""
        return self._nearest(path, self.keys)

    def value(self, path: Path) -> tuple[int, int]:
        """Position of the value at ``path`` (falls back to its key, then to enclosing paths)."""
        p = tuple(path)
        while p:
            if p in self.values:
                return self.values[p]
            if p in self.keys:
                return self.keys[p]
            p = p[:-1]
        return (1, 1)

    def _nearest(self, path: Path, table: dict[Path, tuple[int, int]]) -> tuple[int, int]:
        p = tuple(path)
        while p:
            if p in table:
                return table[p]
            p = p[:-1]
        return (1, 1)

    # -------------------------------------------------------------------------------------- scanning

    def _scan(self, text: str) -> None:
        counts: dict[tuple, int] = {}
        table: Path = ()
        pending: list | None = None  # open multi-line array: [path, index, depth]
        for lineno, raw in enumerate(text.splitlines(), start=1):
            masked = _mask_strings(raw)
            if pending is not None:
                pending = self._array_elements(raw, masked, 0, lineno, pending)
                continue
            m = _HEADER.match(masked)
            if m and not _KEY.match(masked):
                names = _split_key(raw[m.start(2) : m.end(2)])
                col = m.start(1) + 1
                if m.group(1) == "[[":
                    base = self._resolve(names[:-1], counts)
                    k = (*base, names[-1])
                    idx = counts.get(k, -1) + 1
                    counts[k] = idx
                    table = (*k, idx)
                else:
                    table = (*self._resolve(names[:-1], counts), names[-1])
                self.keys.setdefault(table, (lineno, col))
                continue
            km = _KEY.match(masked)
            if not km:
                continue
            names = _split_key(raw[km.start(1) : km.end(1)])
            path = (*table, *names)
            self.keys[path] = (lineno, km.start(1) + 1)
            vstart = km.end()
            self.values[path] = (lineno, vstart + 1)
            pending = self._value(raw, masked, vstart, lineno, path)

    def _resolve(self, names: list[str], counts: dict[tuple, int]) -> Path:
        """Header prefix with array-of-table indices filled in (``chart.select`` -> chart, i, select)."""
        out: list[str | int] = []
        for n in names:
            out.append(n)
            idx = counts.get(tuple(out))
            if idx is not None:
                out.append(idx)
        return tuple(out)

    def _value(self, raw: str, masked: str, start: int, lineno: int, path: Path) -> list | None:
        ch = masked[start : start + 1]
        if ch == "{":
            self._inline_table(raw, masked, start + 1, lineno, path)
            return None
        if ch == "[":
            return self._array_elements(raw, masked, start + 1, lineno, [path, 0, 1])
        return None

    def _inline_table(self, raw: str, masked: str, start: int, lineno: int, path: Path) -> None:
        i, depth = start, 1
        while i < len(masked) and depth > 0:
            km = _KEY.match(masked, i)
            if km and depth == 1:
                names = _split_key(raw[km.start(1) : km.end(1)])
                sub = (*path, *names)
                self.keys[sub] = (lineno, km.start(1) + 1)
                self.values[sub] = (lineno, km.end() + 1)
                i = km.end()
                if masked[i : i + 1] == "[":
                    self._array_elements(raw, masked, i + 1, lineno, [sub, 0, 1])
                continue
            ch = masked[i]
            if ch in "{[":
                depth += 1
            elif ch in "}]":
                depth -= 1
            i += 1

    def _array_elements(self, raw: str, masked: str, start: int, lineno: int, state: list) -> list | None:
        path, index, depth = state
        i = start
        at_element = True
        while i < len(masked):
            ch = masked[i]
            if ch in " \t":
                i += 1
                continue
            if ch == "]":
                depth -= 1
                if depth == 0:
                    return None
            elif ch == "[":
                depth += 1
            elif ch == ",":
                if depth == 1:
                    index += 1
                at_element = True
                i += 1
                continue
            elif at_element and depth == 1:
                self.values[(*path, index)] = (lineno, i + 1)
                at_element = False
                if ch in "\"'":
                    end = masked.find(ch, i + 1)
                    i = end + 1 if end >= 0 else len(masked)
                    continue
            i += 1
        return [path, index, depth]
