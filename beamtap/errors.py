"""Errors a person sees: one line, saying where and what."""


class UsageError(Exception):
    """A mistake by the user (argument, config, file, request).

    The command-line front end prints ``str(error)`` on one line and exits
    with status 2; no traceback.
    """


class ConfigError(UsageError):
    """A config mistake, located by file and key.

    Parameters
    ----------
    where : str
        The file (or ``"<built-in>"``) the value came from.
    key : str
        Dotted key, e.g. ``"array.line.spacing_m"``.
    problem : str
        What is wrong and what is expected, e.g. ``"got -1, expected a
        positive number of metres"``.
    """

    def __init__(self, where: str, key: str, problem: str):
        self.where, self.key, self.problem = where, key, problem
        # A problem with the file as a whole (unreadable, not TOML) has no key to show.
        super().__init__(f"{where}: {problem}" if key == "(file)" else f"{where}: [{key}] {problem}")


class MissingSystemLibrary(UsageError):
    """A system library (PortAudio) is not installed."""


def load_sounddevice():
    """Import sounddevice lazily, with a one-line hint when PortAudio is missing.

    Only commands that touch a sound card call this, so everything else works
    on a machine without PortAudio.
    """
    try:
        import sounddevice  # noqa: PLC0415 - imported lazily on purpose
    except OSError as exc:  # sounddevice raises OSError when libportaudio is absent
        raise MissingSystemLibrary(
            "sound card access needs the PortAudio library: install it with "
            "'sudo apt-get install libportaudio2' (Debian/Ubuntu)"
        ) from exc
    except ImportError as exc:
        raise MissingSystemLibrary(
            "sound card access needs the Python package sounddevice: "
            "'pip install sounddevice'"
        ) from exc
    return sounddevice
