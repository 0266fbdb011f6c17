"""The project's own error type for bad input.

Every reader raises `InputError` for data it cannot use. The message names the file and the line
(and column, where there is one) so a user can go straight to the problem; the CLI prints it as
one sentence instead of a traceback.
"""

from __future__ import annotations


class InputError(Exception):
    """Bad user input: a malformed file, an impossible value, a missing path.

    `path`, `line` and `column` are kept as attributes (1-based; None when unknown) so callers
    that collect errors (for example "skip bad records" modes) can count and list them.
    """

    def __init__(self, message: str, path: str | None = None, line: int | None = None,
                 column: int | None = None):
        self.reason = message
        self.path = path
        self.line = line
        self.column = column
        super().__init__(self._format())

    def _format(self) -> str:
        where = ""
        if self.path is not None:
            where = str(self.path)
            if self.line is not None:
                where += f", line {self.line}"
                if self.column is not None:
                    where += f", column {self.column}"
            where += ": "
        return where + self.reason
