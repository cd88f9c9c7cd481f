"""The single error type raised on bad input.

Every message names the file, the field and the fix, so a user can act on it
without reading a traceback. Scripts catch ``InputError`` at the edge and print
only its message.
"""

__all__ = ["InputError"]


class InputError(ValueError):
    """Bad input: names the offending file, the field (or key) and the fix.

    Parameters
    ----------
    file : str or os.PathLike or None
        The file that holds the problem (``None`` if no single file does).
    field : str
        The column, key, header field or entity at fault.
    problem : str
        What is wrong, with the offending value.
    fix : str
        What the user should do.
    """

    def __init__(self, file, field, problem, fix):
        self.file = None if file is None else str(file)
        self.field = str(field)
        self.problem = str(problem)
        self.fix = str(fix)
        where = self.file if self.file is not None else "(no single file)"
        super().__init__(f"{where}: {self.field}: {self.problem}. Fix: {self.fix}")
