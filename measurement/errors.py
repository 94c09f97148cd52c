"""The one error type for bad input, carrying where the problem is."""

from __future__ import annotations


class InputError(ValueError):
    """Bad input from the user: a data file, a design or an option.

    ``message`` says what is wrong and what to do; the location fields say where, so the
    command line and the HTTP service can name the file, row, column or design field.
    Rows are numbered as a spreadsheet user sees them: the header is row 1, the first
    respondent row 2.
    """

    field_label = "field"  # how where() names ``field`` (an option, say: "options.seed")

    def __init__(
        self,
        message: str,
        *,
        code: str = "bad_input",
        file: str | None = None,
        row: int | None = None,
        column: str | None = None,
        field: str | None = None,
    ) -> None:
        super().__init__(message)
        self.message = message
        self.code = code
        self.file = file
        self.row = row
        self.column = column
        self.field = field

    def where(self) -> str:
        """Where the problem is, in words: file, row, column or design field."""
        parts = []
        if self.file:
            parts.append(self.file)
        if self.row is not None:
            parts.append(f"row {self.row}")
        if self.column is not None:
            parts.append(f"column '{self.column}'")
        if self.field is not None:
            parts.append(f"{self.field_label} '{self.field}'")
        return ", ".join(parts)

    def __str__(self) -> str:
        where = self.where()
        return f"{where}: {self.message}" if where else self.message

    def to_dict(self) -> dict:
        """The error as the HTTP API returns it: code, message (with where) and field."""
        return {
            "code": self.code,
            "message": str(self),
            "field": self.field if self.field is not None else self.column,
        }


class DataError(InputError):
    """The data file cannot be read or its values are unusable (HTTP 422)."""

    def __init__(self, message: str, **kw) -> None:
        kw.setdefault("code", "bad_data")
        super().__init__(message, **kw)


class DesignError(InputError):
    """The study design is invalid (HTTP 400)."""

    field_label = "design field"

    def __init__(self, message: str, **kw) -> None:
        kw.setdefault("code", "bad_design")
        super().__init__(message, **kw)


class UnsupportedFormat(DataError):
    """The file is not a format we read (HTTP 415)."""

    def __init__(self, message: str, **kw) -> None:
        kw.setdefault("code", "unsupported_format")
        super().__init__(message, **kw)
