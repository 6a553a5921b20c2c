"""ConfigError: one sentence naming the file, the key path and the value at fault."""

from __future__ import annotations

import reprlib

#: a key that is absent (shown as "missing")
MISSING = object()
_SHOW = reprlib.Repr()
_SHOW.maxstring = 60
_SHOW.maxother = 60
_SHOW.maxlist = 6
_SHOW.maxdict = 4


class ConfigError(ValueError):
    """A configuration problem: one sentence naming the file, the key path and the value.

    Attributes
    ----------
    key : str
        Key path, e.g. ``stream[2].half_life``.
    value : object
        The value found (the sentinel for a missing key is shown as "missing").
    origin : str or None
        The file (or ``"<string>"``); None until the error reaches the loader.
    """

    def __init__(self, key: str, value: object, message: str,
                 origin: str | None = None) -> None:
        self.key = key
        self.value = value
        self.message = message
        self.origin = origin
        where = f"{origin}: " if origin else ""
        if not key:
            text = f"{where}{message}"
        elif value is MISSING:
            text = f"{where}{key} is missing; {message}"
        else:
            text = f"{where}{key} = {_SHOW.repr(value)} {message}"
        super().__init__(text if text.endswith((".", "?")) else text + ".")

    def with_origin(self, origin: str) -> ConfigError:
        return ConfigError(self.key, self.value, self.message, origin)
