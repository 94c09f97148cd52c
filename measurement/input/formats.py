"""A file format we read, as one object: its name, suffixes, content sniffing, reader and
media types. The registry is ``loading.READERS`` (beside the readers it names); the format
dispatch of :func:`~samesource.input.loading.load_table`, the accepted-format constants and
the HTTP API's format enum are all read from it. Adding a format: DEVELOPERS.md.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

# (the file's bytes, its name for messages, the worksheet asked for) -> a LoadedTable's parts
ReadFunction = Callable[[bytes, str, "str | int | None"], dict[str, Any]]
# (the start of the file, its suffix, its name) -> whether it is this format; may raise
# UnsupportedFormat for a near miss it recognises (a ZIP archive that is a Word document)
SniffFunction = Callable[[bytes, str, "str | None"], bool]


@dataclass(frozen=True)
class FileFormat:
    """One format: ``name`` is report.json's ``data.format`` and the API's ``format``."""

    name: str
    suffixes: tuple[str, ...]            # lower case, with the dot
    media_types: tuple[str, ...]         # IANA media types a client may send it as
    read: ReadFunction
    sniff: SniffFunction | None = None   # None: a delimited-text format, told by suffix or by its delimiter
    kind: str | None = None              # formats of one kind are named together ("delimited text")
    row_label: str = "row"               # what a message calls a row ("case" in SPSS)

    @property
    def text(self) -> bool:
        """A delimited-text format (read by the one text reader, its delimiter sniffed)."""
        return self.sniff is None


def names(readers: Sequence[FileFormat]) -> tuple[str, ...]:
    """Every format's name, in registry order (the API's enum)."""
    return tuple(f.name for f in readers)


def text_suffixes(readers: Sequence[FileFormat]) -> dict[str, str]:
    """Suffix -> the delimited-text format it names (".csv" -> "csv")."""
    return {s: f.name for f in readers if f.text for s in f.suffixes}


def _or(words: Sequence[str]) -> str:
    return words[0] if len(words) == 1 else ", ".join(words[:-1]) + " or " + words[-1]


def readable(readers: Sequence[FileFormat]) -> str:
    """The formats in words, for messages and help: ".csv, .tsv or .txt (delimited text),
    .xlsx, .sav or .parquet (any of them also gzip-compressed, as .csv.gz)"."""
    parts: list[str] = []
    kinds: dict[str, list[str]] = {}
    for f in readers:
        if f.kind is None:
            parts.append(f.suffixes[0])
            continue
        if f.kind not in kinds:
            kinds[f.kind] = []
            parts.append(f.kind)  # a placeholder, filled in below
        kinds[f.kind].append(f.suffixes[0])
    words = [f"{_or(kinds[p])} ({p})" if p in kinds else p for p in parts]
    return f"{_or(words)} (any of them also gzip-compressed, as {readers[0].suffixes[0]}.gz)"
