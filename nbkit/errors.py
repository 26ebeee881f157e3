"""One error family for nbkit, with message templates that name the problem, the value and the fix."""


class NbkitError(Exception):
    """Base class of every error nbkit raises on purpose."""


class RecordingError(NbkitError):
    """A recording on disk is missing, damaged, or from an incompatible version."""


class RecorderError(NbkitError):
    """The recorder cannot attach to, or keep recording, a model and optimizer."""


class ReplayError(NbkitError):
    """A replay cannot start, or its data differ from the recording."""


class RecorderWarning(UserWarning):
    """A recorder problem that was reported instead of raised (strict=False)."""


class RecordingWarning(UserWarning):
    """A recording opened fine but is incomplete (for example it was not closed cleanly)."""
