"""Error types that carry what the caller needs to report a problem in one line."""

__all__ = ["QhlInputError", "MemoryBudgetError"]


class QhlInputError(ValueError):
    """Bad user input: a file, key or value that is not what qhl expects.

    The message is one line and names the file (when there is one), the key and what was
    expected. The CLI prints it and exits with status 2.
    """

    def __init__(self, message: str, *, source: str | None = None, key: str | None = None):
        prefix = ""
        if source:
            prefix += f"{source}: "
        if key:
            prefix += f"{key}: "
        super().__init__(prefix + message)
        self.source = source
        self.key = key


class MemoryBudgetError(QhlInputError):
    """A job whose estimated memory would not fit on this machine.

    Attributes:
        needed_bytes: the estimate.
        available_bytes: what the machine offers.
    """

    def __init__(self, what: str, needed_bytes: float, available_bytes: float,
                 hint: str = "use fewer spins or time points"):
        super().__init__(
            f"{what} needs about {needed_bytes / 2**30:.2f} GiB of memory, "
            f"but only {available_bytes / 2**30:.2f} GiB is available; {hint}"
        )
        self.needed_bytes = needed_bytes
        self.available_bytes = available_bytes
