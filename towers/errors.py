"""The one user-facing error type: a clear one-line message, exit code 2 from the CLI."""


class TowersError(Exception):
    """Bad input or a bad request by the user. The CLI prints `error: <message>` and exits 2.

    Messages name the file, column and row where they apply, then the fix.
    """

    exit_code = 2


def where(path=None, column=None, row=None) -> str:
    """Format the 'file, column, row' prefix used by every input error."""
    parts = []
    if path is not None:
        parts.append(str(path))
    if column is not None:
        parts.append(f"column '{column}'")
    if row is not None:
        parts.append(f"row {row}")
    return ", ".join(parts)
