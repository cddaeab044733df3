"""Errors that reach the user as one short line."""

from __future__ import annotations


class BadInput(Exception):
    """A user's input is wrong. The CLI prints the message (no traceback) and exits with code 2.

    Parameters
    ----------
    file : str
        The file (or argument) at fault, as the user named it.
    field : str, optional
        The field, column, key or array inside it.
    detail : str
        What is wrong, in plain words.
    row : int, optional
        Row or index where the defect was found (0-based for arrays, 1-based data rows for CSV,
        as the message says).

    Examples
    --------
    >>> str(BadInput("gratings.csv", "sf_cpd", "is not a number", row=3))
    'gratings.csv: field sf_cpd, row 3: is not a number'
    """

    def __init__(self, file, field=None, detail="is invalid", row=None):
        self.file = str(file)
        self.field = field
        self.row = row
        self.detail = detail
        parts = [self.file]
        if field is not None:
            parts.append(f"field {field}")
        if row is not None:
            parts.append(f"row {row}")
        super().__init__(": ".join([parts[0], ", ".join(parts[1:])]) + f": {detail}"
                         if len(parts) > 1 else f"{parts[0]}: {detail}")
