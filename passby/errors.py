"""The exceptions passby raises for a user's mistake.

Every error a user can cause (a bad file, a bad option, a bad configuration,
a missing device) is a :class:`PassbyError`. The command line catches it once
and prints one line, ``passby: error: WHERE: what is wrong``, with exit
status 2. Anything else that escapes is an internal fault (exit status 1).
"""


class PassbyError(Exception):
    """Base of the errors caused by input, options or the environment.

    Parameters
    ----------
    message : str
        What is wrong, in one line, without the location.
    where : str, optional
        The file, key or device the message is about.
    """

    def __init__(self, message, where=None):
        super().__init__(message)
        self.message = str(message)
        self.where = None if where is None else str(where)

    def __str__(self):
        return self.message if self.where is None else f"{self.where}: {self.message}"


class InputError(PassbyError):
    """Audio that cannot be read or used (not a WAV, bad header, NaN, ...)."""


class ConfigError(PassbyError):
    """A configuration file or option value that is not acceptable."""


class DeviceError(PassbyError):
    """An audio device that is missing, busy or unusable."""


class LogError(PassbyError):
    """A station log database that cannot be opened or read."""
