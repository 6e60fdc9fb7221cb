"""Errors raised by lotline's library code. Only ``lotline.py`` prints them and sets the exit code.

Hierarchy::

    LotlineError
    ├── IngestError (ValueError)         a file that cannot be read or mapped; names path:line:col
    │   └── ProfileError                 an export profile that is malformed, missing or ambiguous
    ├── ConfigError (ValueError)         a malformed monitoring plan or other configuration file
    └── WarehouseError
        ├── WarehouseNotFoundError (FileNotFoundError)
        ├── WarehouseLockedError (TimeoutError)   another process holds the file
        └── SchemaVersionError                    the file is newer than this lotline

Every error keeps its fields as attributes (``path``, ``line``, ``column``, ``found``, ``expected``, ``fix``)
and builds its message in one place, ``LotlineError.__str__``, in the shape
``<path>:<line>:<col>: <what> (found <x>, expected <y>). Fix: <action>.`` Errors pickle (they survive a
process pool) because ``__reduce__`` rebuilds them from their fields.
"""

from __future__ import annotations

from typing import Any


class LotlineError(Exception):
    """Base of every lotline error."""

    def __init__(
        self,
        what: str,
        *,
        path: str | None = None,
        line: int | None = None,
        column: int | str | None = None,
        found: Any = None,
        expected: Any = None,
        fix: str | None = None,
        details: str | None = None,
    ) -> None:
        self.what = what
        self.path = path
        self.line = line
        self.column = column
        self.found = found
        self.expected = expected
        self.fix = fix
        self.details = details
        super().__init__(str(self))

    def __reduce__(self):  # keep errors picklable with all their fields
        return (_rebuild, (type(self), self._fields()))

    def _fields(self) -> dict[str, Any]:
        return {
            "what": self.what,
            "path": self.path,
            "line": self.line,
            "column": self.column,
            "found": self.found,
            "expected": self.expected,
            "fix": self.fix,
            "details": self.details,
        }

    @property
    def location(self) -> str:
        """``path:line:col`` with the parts that are known."""
        parts = [p for p in (self.path, self.line, self.column) if p is not None]
        return ":".join(str(p) for p in parts)

    def __str__(self) -> str:
        msg = self.what
        if self.location:
            msg = f"{self.location}: {msg}"
        extra = []
        if self.found is not None:
            extra.append(f"found {_show(self.found)}")
        if self.expected is not None:
            extra.append(f"expected {self.expected}")
        if extra:
            msg += f" ({', '.join(extra)})"
        msg += "."
        if self.details:
            msg += f"\n  {self.details}"
        if self.fix:
            msg += f"\n  Fix: {self.fix.rstrip('.')}."
        return msg

    def to_dict(self) -> dict[str, Any]:
        """Fields as a JSON-friendly dict, plus the formatted message."""
        d = {k: v for k, v in self._fields().items() if v is not None}
        d["message"] = str(self)
        d["error"] = type(self).__name__
        return d


def _rebuild(cls: type[LotlineError], fields: dict[str, Any]) -> LotlineError:
    what = fields.pop("what")
    return cls(what, **fields)


def _show(value: Any) -> str:
    text = value if isinstance(value, str) else repr(value)
    if len(text) > 80:
        text = text[:77] + "..."
    return f'"{text}"' if isinstance(value, str) else text


class IngestError(LotlineError, ValueError):
    """A file that cannot be read or mapped to the canonical schema; nothing of it is stored."""


class ProfileError(IngestError):
    """An export profile that is malformed, or a file that matches no profile or several."""


class ConfigError(LotlineError, ValueError):
    """A malformed configuration file (monitoring plan, settings)."""


class WarehouseError(LotlineError):
    """A problem with the warehouse file itself."""


class WarehouseNotFoundError(WarehouseError, FileNotFoundError):
    """The warehouse file does not exist (reads never create one)."""


class WarehouseLockedError(WarehouseError, TimeoutError):
    """Another process held the warehouse file for longer than we were willing to wait."""


class SchemaVersionError(WarehouseError):
    """The warehouse file was written by a newer lotline than this one."""
