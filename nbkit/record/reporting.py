"""How the recorder reports a problem: a RecorderWarning once per problem, or a RecorderError in strict mode."""
from __future__ import annotations

import warnings

from nbkit.errors import RecorderError, RecorderWarning


class ProblemReports:
    """The problems one recorder has reported, so each is said once."""

    def __init__(self, path):
        self.path = path
        self.said: set[str] = set()

    def problem(self, what: str, exc: BaseException | None, *, stop: bool, strict: bool, detail: str = "") -> None:
        """A recorder problem: raised with strict, else warned once, saying whether recording goes on;
        `detail` (a traceback) is appended to the warning, not part of what makes it the same problem."""
        if strict:
            raise RecorderError(f"nbkit recorder: {what}") from exc
        if what not in self.said:
            self.said.add(what)
            cause = f": {type(exc).__name__}: {exc}" if exc is not None else ""
            action = "recording stopped; training continues" if stop else "recording continues"
            warnings.warn(f"nbkit recorder ({self.path}): {what}{cause}; {action}. Pass strict=True to raise "
                          "instead." + (f"\n{detail}" if detail else ""), RecorderWarning, stacklevel=4)

    def usage(self, message: str, key: str | None = None) -> None:
        """A warning about how the recorder is used, once per `key` (default: the message); never raised,
        also with strict=True."""
        if (key or message) not in self.said:
            self.said.add(key or message)
            warnings.warn(f"nbkit recorder ({self.path}): {message}", RecorderWarning, stacklevel=4)
