"""What every nbkit view widget shares: one lock, guarded callbacks, an error panel, a static picture."""
from __future__ import annotations

import base64
import html
import threading
import traceback

import ipywidgets as widgets


def safe_call(fn, *args, on_error=None):
    """Call a user's (or a view part's) callback; an error is reported, never raised into the view.

    on_error=None: the error is dropped; else on_error(traceback text) is called with it.
    """
    try:
        return fn(*args)
    except Exception:                                   # a view keeps working whatever the callback does
        text = traceback.format_exc()
        if on_error is not None:
            on_error(text)
        return None


class StaticPicture:
    """Mixin for views with `png_bytes()`: `.to_png(path)` and a PNG in the notebook's display data,
    so exported notebooks and reports show the view without a kernel."""

    def to_png(self, path):
        """Render the whole view as it is now to a PNG file at `path`."""
        with open(path, "wb") as handle:
            handle.write(self.png_bytes())
        return path

    def display_png_bytes(self) -> bytes:
        """The PNG put in the display data: as png_bytes, but never waiting (a cell's output must not block)."""
        return self.png_bytes()

    def _repr_mimebundle_(self, **kwargs):
        bundle = super()._repr_mimebundle_(**kwargs) or {}
        try:
            bundle["image/png"] = base64.b64encode(self.display_png_bytes()).decode("ascii")
        except Exception:                            # a static image is a fallback; never break display
            pass
        return bundle


class GuardedView(StaticPicture):
    """Mixin for a view widget (put it before the ipywidgets Box in the bases).

    Call `start_guarding()` in `__init__` before building the parts: it makes `lock` (an RLock that
    every view update holds, so a background thread never draws half a change) and `errors` (an
    HTML widget to place in the layout). `guard(fn, *args)` runs an update under the lock and shows
    any error in `errors` instead of raising it into ipywidgets.
    """

    view_name = "view"          # how the error panel names the view: "the explorer hit an error ..."

    def start_guarding(self) -> None:
        self.lock = threading.RLock()
        self.errors = widgets.HTML("")
        self.errors.add_class("nbkit-errors")

    def guard(self, fn, *args):
        """fn(*args) under the view's lock; an error is shown in the view, never raised. Returns fn's
        result, or None after an error."""
        with self.lock:
            return safe_call(fn, *args, on_error=self.show_error)

    def show_error(self, text: str) -> None:
        """Show `text` (a traceback) in the view's error panel; the last 4000 characters are kept."""
        self.errors.value = (f"<details open><summary>the {self.view_name} hit an error and carried on</summary>"
                             f"<pre>{html.escape(text[-4000:])}</pre></details>")
