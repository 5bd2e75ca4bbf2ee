"""The one error a scenario file can raise: :class:`ScenarioError`."""


class ScenarioError(ValueError):
    """A scenario file (or override) that cannot be run as written.

    The message names the file, the key path (``populations[1].diameter``),
    the bad value, and what is allowed; for a misspelt key it suggests the
    nearest known one. The command line turns it into exit code 2.

    Attributes
    ----------
    file : str
        The scenario file (or ``"<string>"``).
    path : str
        Dotted key path with list indices, "" for the whole document.
    reason : str
        What is wrong and what is allowed.
    """

    def __init__(self, file, path, reason):
        self.file = str(file)
        self.path = str(path)
        self.reason = str(reason)
        where = f"{self.file}: {self.path}" if self.path else self.file
        super().__init__(f"{where}: {self.reason}")
