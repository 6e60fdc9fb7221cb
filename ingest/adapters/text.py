"""Raw bytes of a text export -> lines of UTF-8 -> a frame of raw strings (one column per header field).

Pure: works on bytes handed in by ``ingest/jobs.py``. :class:`LineChunker` turns a stream of blocks in the
file's encoding into UTF-8 chunks of whole lines (transcoding in Python where DuckDB and Polars cannot, e.g.
Windows-1252), and guards against a line too long to be a record. :func:`parse_csv_chunk` parses one chunk
with Polars into all-string columns and reports ragged rows as rejects with their line.
"""

from __future__ import annotations

import codecs
import csv
import io

import polars as pl

from warehouse.errors import IngestError

MAX_LINE_BYTES = 8 * 1024 * 1024
"""A line longer than this is not a record of any known export (a binary or a newline-less dump)."""

REJECT_SCHEMA = {"line": pl.Int64, "column": pl.String, "value": pl.String, "reason": pl.String}
LINE = "_line"

BOMS = (
    (codecs.BOM_UTF8, "utf-8-sig"),
    (codecs.BOM_UTF16_LE, "utf-16"),
    (codecs.BOM_UTF16_BE, "utf-16"),
)


def empty_rejects() -> pl.DataFrame:
    return pl.DataFrame(schema=REJECT_SCHEMA)


def bom_encoding(head: bytes) -> str | None:
    """The encoding a byte-order mark announces, or None."""
    for bom, enc in BOMS:
        if head.startswith(bom):
            return enc
    return None


def sniff(head: bytes, *, path: str, expected: str) -> None:
    """Fail early on bytes that cannot be a text export of format ``expected`` (csv or jsonl)."""
    if not head:
        raise IngestError(
            "file is empty",
            path=path,
            line=1,
            column=1,
            found="0 bytes",
            expected=f"a {expected} header line",
            fix="re-export the file; nothing was loaded",
        )
    if head.startswith(b"PAR1"):
        raise IngestError(
            "file holds Parquet bytes but its name says text",
            path=path,
            line=1,
            column=1,
            found="PAR1",
            expected=expected,
            fix="rename it to .parquet",
        )
    if head.startswith(b"\x1f\x8b"):
        raise IngestError(
            "file holds gzip bytes but its name lacks .gz",
            path=path,
            line=1,
            column=1,
            found="1f 8b",
            expected=expected,
            fix="rename it to end in .gz",
        )
    enc = bom_encoding(head)
    if enc == "utf-16":
        return
    sample = head[:65536]
    nul = sample.find(b"\x00")
    ctrl = sum(sample.count(bytes([b])) for b in range(0, 32) if b not in (9, 10, 13))
    if nul >= 0 or ctrl > max(8, len(sample) // 100):
        pos = nul if nul >= 0 else next(i for i, b in enumerate(sample) if b < 32 and b not in (9, 10, 13))
        line = sample[:pos].count(b"\n") + 1
        col = pos - (sample.rfind(b"\n", 0, pos) + 1) + 1
        raise IngestError(
            "file is binary, not a text export",
            path=path,
            line=line,
            column=col,
            found=f"byte 0x{sample[pos]:02x}",
            expected=f"{expected} text",
            fix="check that the right file was exported (a text file without NUL bytes)",
        )


def decode_head(head: bytes, encoding: str) -> str:
    """Decode the first block leniently (only to read a header)."""
    enc = bom_encoding(head) or encoding
    cut = head
    if enc == "utf-16" and len(cut) % 2:
        cut = cut[:-1]
    return cut.decode(enc, errors="replace").lstrip("\ufeff")


def header_fields(text: str, *, delimiter: str, header_line: int) -> list[str]:
    """The header's fields (line ``header_line``, 1-based), stripped of blanks and quotes."""
    cut = -1
    for _ in range(header_line):  # split only the lines up to the header (the text may be a 1 MB block)
        cut = text.find("\n", cut + 1)
        if cut < 0:
            break
    lines = (text if cut < 0 else text[: cut + 1]).splitlines()
    if len(lines) < header_line:
        return []
    row = next(csv.reader([lines[header_line - 1]], delimiter=delimiter))
    return [f.strip().strip('"') for f in row]


class LineChunker:
    """Turn blocks of the file's bytes into UTF-8 chunks of whole lines, after the header.

    Tracks the line number of each chunk's first line. Raises :class:`IngestError` with ``path:line:col``
    for bytes invalid in the encoding and for a line longer than :data:`MAX_LINE_BYTES`.
    """

    def __init__(
        self,
        *,
        path: str,
        encoding: str,
        skip_lines: int,
        chunk_bytes: int,
        max_line_bytes: int = MAX_LINE_BYTES,
    ) -> None:
        self.path = path
        self.encoding = encoding
        self.skip = skip_lines
        self.chunk_bytes = chunk_bytes
        self.max_line = max_line_bytes
        self.next_line = 1  # line number of the first byte in self._buf
        self._buf = b""
        self._parts: list[bytes] = []
        self._size = 0
        self._tail = 0
        self._bytes_in = 0
        self._decoder = None
        self._first = True
        if encoding not in ("utf-8", "utf-8-sig"):
            self._decoder = codecs.getincrementaldecoder(encoding)(errors="strict")

    def _transcode(self, block: bytes, final: bool) -> bytes:
        if self._decoder is None:
            if self._first and block.startswith(codecs.BOM_UTF8):
                block = block[3:]
            self._first = False
            return block
        try:
            text = self._decoder.decode(block, final)
        except UnicodeDecodeError as exc:
            raise self._bad_bytes(block, exc) from None
        if self._first:
            text = text.lstrip("\ufeff")
            self._first = False
        return text.encode("utf-8")

    def _bad_bytes(self, block: bytes, exc: UnicodeDecodeError) -> IngestError:
        before = self._buf.count(b"\n")
        line = self.next_line + before + block[: exc.start].count(b"\n")
        col = exc.start - (block.rfind(b"\n", 0, exc.start) + 1) + 1
        return IngestError(
            f"bytes invalid in encoding {self.encoding}",
            path=self.path,
            line=line,
            column=col,
            found=f"byte 0x{block[exc.start]:02x}",
            expected=self.encoding,
            fix="set the right [csv] encoding in the profile (utf-8, utf-8-sig, utf-16, latin-1, cp1252)",
        )

    def feed(self, block: bytes, *, final: bool = False) -> list[tuple[int, bytes]]:
        """Add a block; return ``(first_line, utf8_bytes)`` chunks of complete lines ready to parse."""
        self._bytes_in += len(block)
        data = self._transcode(block, final)
        out: list[tuple[int, bytes]] = []
        if self.skip:
            buf = self._buf + data if self._buf else data
            while self.skip and buf:
                nl = buf.find(b"\n")
                if nl < 0:
                    break
                buf = buf[nl + 1 :]
                self.next_line += 1
                self.skip -= 1
            if self.skip and not final:
                self._buf = buf  # still inside the lines before the data
                self._check_long(buf)
                return out
            self._buf, self._parts, self._size = b"", [buf] if buf else [], len(buf)
            nl = buf.rfind(b"\n")
            self._tail = len(buf) if nl < 0 else len(buf) - nl - 1
        elif data:
            self._parts.append(data)
            self._size += len(data)
            nl = data.rfind(b"\n")
            self._tail = self._tail + len(data) if nl < 0 else len(data) - nl - 1
        if self._tail > self.max_line:
            self._too_long(self._tail)
        if final:
            buf = b"".join(self._parts)
            self._parts, self._size = [], 0
            if buf:
                self._check_utf8(buf)
                out.append((self.next_line, buf))
            return out
        if self._size < self.chunk_bytes:
            return out
        buf = b"".join(self._parts)
        cut = buf.rfind(b"\n")
        if cut < 0:
            self._check_long(buf)
            self._parts = [buf]
            return out
        chunk, rest = buf[: cut + 1], buf[cut + 1 :]
        self._parts, self._size = ([rest] if rest else []), len(rest)
        self._check_long(rest)
        self._check_utf8(chunk)
        out.append((self.next_line, chunk))
        self.next_line += chunk.count(b"\n")
        return out

    def _check_long(self, tail: bytes) -> None:
        if len(tail) > self.max_line and tail.find(b"\n") < 0:
            self._too_long(len(tail))

    def _too_long(self, n: int) -> None:
        raise IngestError(
            f"line is longer than {self.max_line} bytes",
            path=self.path,
            line=self.next_line + sum(p.count(b"\n") for p in self._parts),
            column=1,
            found=f"no newline within {self.max_line} bytes",
            expected="one record per line",
            fix="check that the file is a line-oriented export (not a binary or a single-line dump)",
        )

    def _check_utf8(self, chunk: bytes) -> None:
        if self._decoder is not None:
            return
        try:
            chunk.decode("utf-8")
        except UnicodeDecodeError as exc:
            line = self.next_line + chunk[: exc.start].count(b"\n")
            start = chunk.rfind(b"\n", 0, exc.start) + 1
            col = len(chunk[start : exc.start].decode("utf-8", errors="replace")) + 1
            raise IngestError(
                "bytes invalid in encoding utf-8",
                path=self.path,
                line=line,
                column=col,
                found=f"byte 0x{chunk[exc.start]:02x}",
                expected="utf-8",
                fix='the file is probably Latin-1 or Windows-1252: set encoding = "cp1252" (or "latin-1") '
                "under [csv] in its profile",
            ) from None


def parse_csv_chunk(
    data: bytes, *, header: list[str], delimiter: str, first_line: int, source: str
) -> tuple[pl.DataFrame, pl.DataFrame]:
    """Parse UTF-8 CSV lines (no header) into all-string columns plus ``_line``; ragged rows are rejects.

    Blank lines are skipped. Returns (raw frame, rejects).
    """
    ncols = len(header)
    schema = {h: pl.String for h in header}
    if b'"' in data:
        return _parse_quoted(data, header=header, delimiter=delimiter, first_line=first_line)
    d = delimiter.encode()
    try:
        df = pl.read_csv(
            io.BytesIO(data),
            has_header=False,
            schema=schema,
            separator=delimiter,
            quote_char=None,
            raise_if_empty=False,
            truncate_ragged_lines=False,
        )
        lines = data.count(b"\n") + (0 if data.endswith(b"\n") else 1)
        has_blank = b"\n\n" in data or b"\n\r\n" in data or data[:1] in (b"\n", b"\r")
        blank = (
            data.count(b"\n\n") + data.count(b"\n\r\n") + (1 if data[:1] in (b"\n", b"\r") else 0)
            if has_blank
            else 0
        )
        consistent = df.height == lines and data.count(d) == (lines - blank) * (ncols - 1)
    except pl.exceptions.PolarsError:
        consistent = False
    if consistent:
        df = df.with_columns(pl.int_range(first_line, first_line + df.height, dtype=pl.Int64).alias(LINE))
        return (_drop_blank(df, header) if blank else df), empty_rejects()
    return _parse_ragged(data, header=header, delimiter=delimiter, first_line=first_line)


def _drop_blank(df: pl.DataFrame, header: list[str]) -> pl.DataFrame:
    if df.height == 0:
        return df
    blank = pl.all_horizontal([pl.col(h).is_null() for h in header])
    return df.filter(~blank)


def _parse_ragged(
    data: bytes, *, header: list[str], delimiter: str, first_line: int
) -> tuple[pl.DataFrame, pl.DataFrame]:
    ncols = len(header)
    d = delimiter.encode()
    lines = data.split(b"\n")
    if lines and lines[-1] == b"":
        lines.pop()
    keep: list[bytes] = []
    keep_lines: list[int] = []
    rej: list[tuple[int, str | None, str, str]] = []
    for i, raw in enumerate(lines):
        text = raw.rstrip(b"\r")
        if not text.strip():
            continue
        n = text.count(d) + 1
        if n != ncols:
            shown = text[:200].decode("utf-8", errors="replace")
            rej.append(
                (first_line + i, None, shown, f"row has {n} fields, the header has {ncols} (ragged row)")
            )
            continue
        keep.append(text)
        keep_lines.append(first_line + i)
    schema = {h: pl.String for h in header}
    if keep:
        df = pl.read_csv(
            io.BytesIO(b"\n".join(keep) + b"\n"),
            has_header=False,
            schema=schema,
            separator=delimiter,
            quote_char=None,
        )
    else:
        df = pl.DataFrame(schema=schema)
    df = df.with_columns(pl.Series(LINE, keep_lines, dtype=pl.Int64))
    return _drop_blank(df, header), pl.DataFrame(rej, schema=REJECT_SCHEMA, orient="row")


def _parse_quoted(
    data: bytes, *, header: list[str], delimiter: str, first_line: int
) -> tuple[pl.DataFrame, pl.DataFrame]:
    ncols = len(header)
    reader = csv.reader(io.StringIO(data.decode("utf-8"), newline=""), delimiter=delimiter)
    cols: list[list[str | None]] = [[] for _ in header]
    line_no: list[int] = []
    rej: list[tuple[int, str | None, str, str]] = []
    start = 1
    try:
        for row in reader:
            line = first_line + start - 1
            start = reader.line_num + 1
            if not row or all(not f.strip() for f in row) and len(row) <= 1:
                continue
            if len(row) != ncols:
                rej.append(
                    (
                        line,
                        None,
                        delimiter.join(row)[:200],
                        f"row has {len(row)} fields, the header has {ncols} (ragged row)",
                    )
                )
                continue
            for c, v in zip(cols, row, strict=True):
                c.append(v if v != "" else None)
            line_no.append(line)
    except csv.Error as exc:
        raise IngestError(
            "unreadable CSV quoting",
            path=None,
            line=first_line + start - 1,
            details=str(exc),
            fix="check the quotes of that line",
        ) from None
    df = pl.DataFrame({h: pl.Series(h, c, dtype=pl.String) for h, c in zip(header, cols, strict=True)})
    df = df.with_columns(pl.Series(LINE, line_no, dtype=pl.Int64))
    return df, pl.DataFrame(rej, schema=REJECT_SCHEMA, orient="row")
