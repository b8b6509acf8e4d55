"""The one error type the engine raises for bad input."""


class InputError(ValueError):
    """Bad input, located precisely: which file, which record, which field.

    ``record`` is a human locator such as ``"annotations[12]"``, ``"record 3"`` or
    ``"line 14"``; ``field`` names the offending field (``"bbox"``, ``"score"``).
    Either may be empty when the problem concerns the whole file.
    """

    def __init__(self, path, message, *, record="", field=""):
        self.path = str(path)
        self.record = record
        self.field = field
        self.message = message
        super().__init__(str(self))

    def __str__(self):
        parts = [self.path]
        if self.record:
            parts.append(self.record)
        if self.field:
            parts.append(f"field '{self.field}'")
        return ": ".join(parts) + ": " + self.message

    def as_dict(self):
        return {
            "file": self.path,
            "record": self.record,
            "field": self.field,
            "message": self.message,
        }
